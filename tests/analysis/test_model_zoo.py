"""Every zoo architecture in every format users bring: Grad-CAM equals its formula computed directly
on the eager model at the same layer (Selvaraju et al., 2017, eq. 1-2: alpha_k = spatial mean of
d y_c / d A^k, map = ReLU(sum_k alpha_k A^k), upsampled bilinearly), and the chosen layer is sane."""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from analysis.architectures import ResNet18
from analysis.layer_taps import DegenerateMapWarning
from analysis.model_io import LoadedModel, Sidecar, load_model, prepare_model
from analysis.saliency import compute_saliency

from .model_zoo import BY_NAME, ZOO, ZooEntry

FORMATS = ("exported", "torchscript", "factory")
SIZE = 32


def _trained_looking(entry: ZooEntry) -> nn.Module:
    """The zoo model with its weights and batch-norm statistics moved off their initial values."""
    torch.manual_seed(7)
    model = entry.build().eval()
    with torch.no_grad():
        for p in model.parameters():
            p.add_(0.1 * torch.randn_like(p))
        for name, b in model.named_buffers():
            if name.endswith("running_mean"):
                b.copy_(0.1 * torch.randn_like(b))
            elif name.endswith("running_var"):
                b.copy_(1 + 0.2 * torch.rand_like(b))
    return model


@pytest.fixture(scope="module")
def zoo_files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[nn.Module, Path]]:
    """Each model saved in each format beside its sidecar (built once for the module)."""
    root = tmp_path_factory.mktemp("zoo")
    out = {}
    for i, entry in enumerate(ZOO):
        d = root / entry.name
        d.mkdir()
        model = _trained_looking(entry)
        x = torch.randn(2, 3, SIZE, SIZE)
        program = torch.export.export(model, (x,), dynamic_shapes=({0: torch.export.Dim("batch")},))
        torch.export.save(program, d / "model.pt2")
        torch.jit.script(model).save(str(d / "model.pt"))
        state = model.state_dict()
        # Checkpoints come in the shapes people save them in: plain, wrapped, DataParallel-prefixed.
        if i % 3 == 1:
            torch.save({"state_dict": state, "epoch": 3}, d / "checkpoint.pt")
        elif i % 3 == 2:
            torch.save({f"module.{k}": v for k, v in state.items()}, d / "checkpoint.pt")
        else:
            torch.save(state, d / "checkpoint.pt")
        sidecar = {"classes": ["bottle", "can", "carton"], "input_size": [SIZE, SIZE], "mean": [0.5, 0.5, 0.5], "std": [0.25, 0.25, 0.25]}
        sidecar.update(dict(entry.sidecar_extra))
        (d / "sidecar.json").write_text(json.dumps(sidecar))
        out[entry.name] = (model, d)
    return out


def _load(fmt: str, entry: ZooEntry, d: Path) -> LoadedModel:
    if fmt == "exported":
        return load_model(d / "model.pt2", d / "sidecar.json")
    if fmt == "torchscript":
        return load_model(d / "model.pt", d / "sidecar.json")
    return load_model(d / "checkpoint.pt", d / "sidecar.json", factory=f"tests.analysis.model_zoo:{entry.name}")


def direct_gradcam(model: nn.Module, layer: str, x: torch.Tensor, *, output: str | None, prefix: int | None) -> tuple[torch.Tensor, torch.Tensor]:
    """The formula written out on the eager model: hook the layer, differentiate the predicted logit."""
    model = copy.deepcopy(model)
    for m in model.modules():
        if hasattr(m, "inplace"):
            m.inplace = False
    saved: list[torch.Tensor] = []
    handle = model.get_submodule(layer).register_forward_hook(lambda _m, _i, o: saved.append(o))
    out = model(x)
    handle.remove()
    logits = out[output] if output is not None else out
    pred = logits.argmax(1)
    (activation,) = saved
    (grads,) = torch.autograd.grad(logits.gather(1, pred[:, None]).sum(), activation)
    if activation.ndim == 3:  # tokens: drop the class token, lay the patches out on their grid
        n, t, dim = activation.shape
        side = round((t - (prefix or 0)) ** 0.5)
        activation = activation[:, prefix:].reshape(n, side, side, dim).permute(0, 3, 1, 2)
        grads = grads[:, prefix:].reshape(n, side, side, dim).permute(0, 3, 1, 2)
    alpha = grads.mean(dim=(2, 3), keepdim=True)
    cam = F.relu((alpha * activation).sum(1, keepdim=True))
    return F.interpolate(cam, size=x.shape[2:], mode="bilinear", align_corners=False)[:, 0].detach(), pred


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("name", [e.name for e in ZOO])
def test_zoo_gradcam_equals_direct_formula_and_layer_is_sane(name: str, fmt: str, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    entry = BY_NAME[name]
    eager, d = zoo_files[name]
    loaded = _load(fmt, entry, d)
    # Default layer: the last one before global pooling with a useful map, the one a person would pick.
    assert loaded.target_layer == entry.expected_layer
    assert min(loaded.map_size) >= 4 and not loaded.warnings
    x = torch.randn(5, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(11))
    ours = compute_saliency(loaded, x)
    ref, pred = direct_gradcam(eager, loaded.target_layer, x, output=dict(entry.sidecar_extra).get("output"), prefix=entry.token_prefix)  # type: ignore[arg-type]
    assert ours.predicted.tolist() == pred.tolist()
    assert float(ref.max()) > 0  # a map that is not all zero, so the comparison can fail
    torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-5 * max(1.0, float(ref.max())))
    with torch.no_grad():
        out = eager(x)
        logits = out["logits"] if isinstance(out, dict) else out
    torch.testing.assert_close(torch.from_numpy(ours.probabilities), torch.softmax(logits, 1), rtol=1e-4, atol=1e-5)


def test_exported_program_fixed_to_one_batch_size_runs_in_chunks(tmp_path: Path, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    eager, d = zoo_files["residual_flatten"]
    torch.export.save(torch.export.export(eager, (torch.randn(1, 3, SIZE, SIZE),)), tmp_path / "one.pt2")
    loaded = load_model(tmp_path / "one.pt2", d / "sidecar.json")
    assert loaded.max_batch == 1 and any("batch size 1" in n for n in loaded.notes)
    x = torch.randn(3, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(2))
    ref, _ = direct_gradcam(eager, loaded.target_layer, x, output=None, prefix=None)
    torch.testing.assert_close(torch.from_numpy(compute_saliency(loaded, x).maps), ref, rtol=1e-4, atol=1e-6)


def test_one_by_one_map_warns_and_names_larger_layers() -> None:
    # ResNet-18 at 32 px: layer4 gives a 1x1 map, so every region would be the whole image.
    torch.manual_seed(0)
    sidecar = Sidecar(classes=("a", "b", "c"), input_size=(32, 32), target_layer="layer4")
    with pytest.warns(DegenerateMapWarning, match=r"1x1 map.*layer2 \(4x4\)"):
        loaded = prepare_model(ResNet18(3), sidecar)
    assert loaded.map_size == (1, 1) and "layer2" in loaded.warnings[0]
    chosen = prepare_model(ResNet18(3), Sidecar(classes=("a", "b", "c"), input_size=(32, 32)))
    assert chosen.target_layer == "layer2" and chosen.map_size == (4, 4) and not chosen.warnings


def test_default_layer_on_a_model_with_only_coarse_maps_takes_the_largest_and_warns() -> None:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv2d(3, 4, 4, stride=4), nn.ReLU(), nn.Conv2d(4, 4, 2, stride=2), nn.Flatten(), nn.Linear(4, 3))
    with pytest.warns(DegenerateMapWarning, match="2x2 map"):
        loaded = prepare_model(model, Sidecar(classes=("a", "b", "c"), input_size=(8, 8)))
    assert loaded.target_layer == "1" and loaded.map_size == (2, 2)


@pytest.mark.parametrize("name", ["dense_concat", "vit"])
def test_torchscript_predicting_in_inference_mode_does_not_break_later_gradcam(name: str, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    # TorchScript keeps tensors from its first runs; made under inference_mode they broke autograd later.
    _, d = zoo_files[name]
    loaded = load_model(d / "model.pt", d / "sidecar.json")
    x = torch.randn(2, 3, SIZE, SIZE)
    for _ in range(3):
        with torch.inference_mode():
            before = loaded.module(x)
        after = compute_saliency(loaded, x)
    torch.testing.assert_close(torch.from_numpy(after.probabilities), torch.softmax(before, 1))


class _DeadChannel(nn.Module):
    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x * torch.tensor([0.0, 1.0, 1.0, 1.0, 1.0, 1.0]).view(1, 6, 1, 1)


class _PooledHeads(nn.Module):
    """The map goes straight into a sum, an amax (with a dead channel: every position ties), a 1x1
    adaptive pool and, in ``mixed``, also into a branch that is no pooling, so both parts count."""

    def __init__(self, mixed: bool) -> None:
        super().__init__()
        self.features = nn.Sequential(nn.Conv2d(3, 6, 3, padding=1), nn.ReLU(), _DeadChannel())
        self.fc = nn.Linear(18, 3)
        self.corner = nn.Linear(6, 3)
        self.mixed = mixed

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        a = self.features(x)
        pooled = torch.cat([a.sum(dim=(2, 3)) / 100, a.amax(dim=(-1, -2)), F.adaptive_avg_pool2d(a, 1).flatten(1)], dim=1)
        out = self.fc(pooled)
        if self.mixed:
            out = out + self.corner(a[:, :, 0, 0])
        return out


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("mixed", [False, True])
def test_gradient_stopped_at_global_pooling_equals_the_formula(fmt: str, mixed: bool, tmp_path: Path) -> None:
    torch.manual_seed(5)
    model = _PooledHeads(mixed).eval()
    sidecar = Sidecar(classes=("bottle", "can", "carton"), input_size=(SIZE, SIZE), mean=(0.5,) * 3, std=(0.25,) * 3, target_layer="features")
    if fmt == "exported":
        module: nn.Module = torch.export.export(model, (torch.randn(2, 3, SIZE, SIZE),), dynamic_shapes=({0: torch.export.Dim("batch")},)).module()
    elif fmt == "torchscript":
        module = torch.jit.script(copy.deepcopy(model))  # heedmap freezes the scripted parameters
    else:
        module = model
    loaded = prepare_model(module, sidecar)
    x = torch.randn(4, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(3))
    assert len(loaded.tap(x).pooled) == 3  # the gradient stops at each pooling (so this checks that path)
    ours = compute_saliency(loaded, x)
    ref, pred = direct_gradcam(model, "features", x, output=None, prefix=None)
    assert ours.predicted.tolist() == pred.tolist()
    assert float(ref.max()) > 0
    torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-5 * max(1.0, float(ref.max())))


def _backward_node_names(out: torch.Tensor) -> set[str]:
    names, seen, stack = set(), set(), [out.grad_fn]
    while stack:
        node = stack.pop()
        if node is None or id(node) in seen:
            continue
        seen.add(id(node))
        names.add(node.name())
        stack.extend(f for f, _ in node.next_functions)
    return names


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("layer", ["blocks.1.norm1", "blocks.0.norm1"])
def test_vit_attention_after_the_layer_runs_row_sparse_backward_and_gradcam_equals_formula(fmt: str, layer: str, tmp_path: Path, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    # At blocks.1.norm1 only the class token's row carries gradient out of the last attention; at
    # blocks.0.norm1 the first attention gets gradient on every row (torch's backward kernel then).
    eager, d = zoo_files["vit"]
    sidecar = json.loads((d / "sidecar.json").read_text())
    (tmp_path / "sidecar.json").write_text(json.dumps({**sidecar, "target_layer": layer}))
    model_file = {"exported": "model.pt2", "torchscript": "model.pt", "factory": "checkpoint.pt"}[fmt]
    factory = "tests.analysis.model_zoo:vit" if fmt == "factory" else None
    loaded = load_model(d / model_file, tmp_path / "sidecar.json", factory=factory)
    x = torch.randn(4, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(9))
    tapped = loaded.tap(x)
    names = _backward_node_names(loaded.logits(tapped.out))
    assert any("attentionrows" in n.lower().replace("_", "") for n in names)
    flat = {n.lower().replace("_", "") for n in names}
    for op in ("linearrows", "gelurows", "layernormrows"):  # the MLP, the norms and the output projection too
        assert any(op in n for n in flat), op
    ours = compute_saliency(loaded, x)
    ref, pred = direct_gradcam(eager, layer, x, output=None, prefix=1)
    assert ours.predicted.tolist() == pred.tolist() and float(ref.max()) > 0
    torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-5 * max(1.0, float(ref.max())))


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("name", ["silu", "dense_concat"])
def test_pooling_after_an_elementwise_tail_spreads_its_gradient_and_gradcam_equals_formula(name: str, fmt: str, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    # silu: mean(silu(conv3)); dense_concat: adaptive_avg_pool(relu(norm)): the pooled map is not the
    # layer's own, so its backward hands a broadcast gradient to the SiLU / ReLU backward.
    entry = BY_NAME[name]
    eager, d = zoo_files[name]
    loaded = _load(fmt, entry, d)
    x = torch.randn(4, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(13))
    tapped = loaded.tap(x)
    assert any("spread" in n.lower() for n in _backward_node_names(loaded.logits(tapped.out)))
    ours = compute_saliency(loaded, x)
    ref, pred = direct_gradcam(eager, loaded.target_layer, x, output=None, prefix=None)
    assert ours.predicted.tolist() == pred.tolist() and float(ref.max()) > 0
    torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-5 * max(1.0, float(ref.max())))


@pytest.mark.parametrize("act", ["identity", "relu", "silu"])
@pytest.mark.parametrize("pool", ["mean", "mean_keepdim", "sum", "adaptive"])
def test_spread_pooled_gradient_is_torchs(pool: str, act: str) -> None:
    from analysis.layer_taps import _SpreadPooled

    x = torch.randn(3, 5, 7, 6, dtype=torch.float64)
    pools = {
        "mean": lambda t: t.mean(dim=(2, 3)),
        "mean_keepdim": lambda t: t.mean(dim=(-1, -2), keepdim=True),
        "sum": lambda t: t.sum(dim=(2, 3)),
        "adaptive": lambda t: F.adaptive_avg_pool2d(t, 1),
    }
    fn = pools[pool]
    area = 1 if pool == "sum" else 42
    a, b = x.clone().requires_grad_(True), x.clone().requires_grad_(True)
    f = {"identity": lambda t: t * 1.0, "relu": F.relu, "silu": F.silu}[act]
    ya, yb = fn(f(a)), _SpreadPooled.apply(f(b), fn, area)
    assert torch.equal(ya, yb)  # the forward is torch's own pooling
    g = torch.randn_like(ya)
    (ga,) = torch.autograd.grad(ya, a, g)
    (gb,) = torch.autograd.grad(yb, b, g)
    if act == "silu":  # SiLU's backward kernel vectorises a broadcast gradient differently: last-bit differences
        torch.testing.assert_close(gb, ga, rtol=1e-14, atol=0.0)
    else:
        assert torch.equal(ga, gb)


@pytest.mark.parametrize("fmt", ["exported", "factory"])
def test_vit_packed_projection_is_split_by_one_unbind(fmt: str, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    # The q, k, v parts of attention's packed projection after the layer: one unbind, not three selects.
    eager, d = zoo_files["vit"]
    loaded = _load(fmt, BY_NAME["vit"], d)
    x = torch.randn(3, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(4))
    names = _backward_node_names(loaded.logits(loaded.tap(x).out))
    assert "UnbindBackward0" in names
    ours = compute_saliency(loaded, x)
    ref, _ = direct_gradcam(eager, loaded.target_layer, x, output=None, prefix=1)
    torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-5 * max(1.0, float(ref.max())))


def test_select_parts_only_splits_short_dimensions_that_record_gradients() -> None:
    from analysis.layer_taps import _select_parts

    parts: dict[tuple[int, int], tuple[torch.Tensor, tuple[torch.Tensor, ...], int]] = {}
    x = torch.randn(3, 4, 5, requires_grad=True)
    with torch.enable_grad():
        first = _select_parts("__getitem__", (x, 1), {}, parts)
        again = _select_parts("select", (x, 0, -1), {}, parts)
        assert first is not None and again is not None and torch.equal(first, x[1]) and torch.equal(again, x[2])
        assert len(parts) == 1  # one unbind served both
        assert _select_parts("select", (x, 2, 0), {}, parts) is None  # 5 long: torch's select
        assert _select_parts("select", (x.detach(), 0, 0), {}, parts) is None  # no gradient recorded
        assert _select_parts("__getitem__", (x, slice(0, 1)), {}, parts) is None
    with torch.no_grad():
        assert _select_parts("select", (x, 0, 0), {}, parts) is None


def test_select_parts_after_an_in_place_change_gives_the_changed_values_and_torchs_gradient() -> None:
    from analysis.layer_taps import _select_parts

    parts: dict[tuple[int, int], tuple[torch.Tensor, tuple[torch.Tensor, ...], int]] = {}
    w = torch.randn(3, 4, requires_grad=True)
    with torch.enable_grad():
        x = w * 1.0
        first = _select_parts("select", (x, 0, 0), {}, parts)
        assert first is not None
        x.mul_(2.0)  # changed in place between two selects: the first unbind's parts are stale
        second = _select_parts("select", (x, 0, 1), {}, parts)
        assert second is not None and torch.equal(second, 2.0 * w[1].detach())
        (second.sum() * 3.0).backward()
    torch.testing.assert_close(w.grad, torch.tensor([[0.0] * 4, [6.0] * 4, [0.0] * 4]))  # d/dw of 3*sum(2*w[1])


def test_spread_mean_over_every_dimension_has_torchs_gradient() -> None:
    import analysis.layer_taps  # noqa: F401  registers the op

    x = torch.randn(2, 3, 4, 5, dtype=torch.float64, requires_grad=True)
    for dims, keep in (([], False), ([2, 3], True), ([-1], False)):
        y = torch.ops.heedmap.spread_mean(x, dims, keep, False)
        torch.testing.assert_close(y, x.mean(dims, keep))
        (g,) = torch.autograd.grad(y.sum(), x)
        (ref,) = torch.autograd.grad(x.mean(dims, keep).sum(), x)
        torch.testing.assert_close(g, ref)


class _GatedAfterLayer(nn.Module):
    """A gate computed from the input before the layer multiplies the layer's map (autograd must
    save the gate), and a tensor from before the layer is changed in place after it."""

    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Sequential(nn.Conv2d(3, 6, 3, padding=1), nn.ReLU())
        self.gate = nn.Conv2d(3, 6, 1)
        self.fc = nn.Linear(6, 3)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        g = torch.sigmoid(self.gate(x))
        a = self.features(x)
        g.mul_(2.0)
        return self.fc((a * g).mean(dim=(2, 3)))


@pytest.mark.parametrize("fmt", ["exported", "factory"])
def test_model_using_tensors_from_before_the_layer_falls_back_from_inference_mode(fmt: str) -> None:
    torch.manual_seed(3)
    model = _GatedAfterLayer().eval()
    sidecar = Sidecar(classes=("bottle", "can", "carton"), input_size=(SIZE, SIZE), target_layer="features")
    module = torch.export.export(model, (torch.randn(2, 3, SIZE, SIZE),), dynamic_shapes=({0: torch.export.Dim("batch")},)).module() if fmt == "exported" else copy.deepcopy(model)
    loaded = prepare_model(module, sidecar)
    x = torch.randn(4, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(8))
    ref, pred = direct_gradcam(model, "features", x, output=None, prefix=None)
    for _ in range(2):  # the second batch goes straight to the ordinary path
        ours = compute_saliency(loaded, x)
        assert ours.predicted.tolist() == pred.tolist() and float(ref.max()) > 0
        torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-5 * max(1.0, float(ref.max())))
    assert loaded.tap.inference is False  # type: ignore[union-attr]


def test_tap_runs_the_part_before_the_layer_in_inference_mode(zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    eager, d = zoo_files["residual_flatten"]
    loaded = _load("factory", BY_NAME["residual_flatten"], d)
    seen: list[bool] = []
    handle = loaded.module.inner.get_submodule("block1").register_forward_hook(lambda _m, _i, out: seen.append(out.is_inference()))
    try:
        tapped = loaded.tap(torch.randn(2, 3, SIZE, SIZE))
    finally:
        handle.remove()
    assert seen == [True] and loaded.tap.inference is True  # type: ignore[union-attr]
    assert not tapped.activation.is_inference() and tapped.activation.requires_grad


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("name", ["residual_flatten", "vit"])
def test_gradcam_in_two_threads_at_once_equals_one_at_a_time(name: str, fmt: str, zoo_files: dict[str, tuple[nn.Module, Path]]) -> None:
    """The saliency job computes two batches at once on one loaded model, each in a thread of its own:
    every format's tap (forward hooks on shared modules, TorchScript's edited graph) must keep the two
    apart, giving each batch exactly what it gets alone."""
    import threading

    loaded = _load(fmt, BY_NAME[name], zoo_files[name][1])
    inputs = [torch.randn(4, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(20 + i)) for i in range(8)]
    alone = [compute_saliency(loaded, x) for x in inputs]
    together: dict[int, object] = {}
    failures: list[BaseException] = []
    start = threading.Barrier(2)

    def work(part: int) -> None:
        try:
            start.wait()
            for i in range(part, len(inputs), 2):
                together[i] = compute_saliency(loaded, inputs[i])
        except BaseException as exc:  # noqa: BLE001  # reported below, with the thread's error
            failures.append(exc)

    threads = [threading.Thread(target=work, args=(p,)) for p in (0, 1)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not failures, failures
    for i, one in enumerate(alone):
        got = together[i]
        assert isinstance(got, type(one))
        assert (got.predicted == one.predicted).all() and (got.maps == one.maps).all() and (got.probabilities == one.probabilities).all(), i
