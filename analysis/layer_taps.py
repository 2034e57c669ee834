"""A model's layers by module path, one layer's output tapped with gradients, and the Grad-CAM layer chosen.

Three kinds of graph are handled the same way:

* an eager ``nn.Module`` (a factory's model, a named architecture): forward hooks;
* an exported program (``torch.export``): its graph's nodes carry the module path they came
  from (``meta["nn_module_stack"]``); a layer's output is the node of that module whose value
  leaves it, and an identity module inserted after that node is the hook point;
* TorchScript: the inlined graph's nodes carry their module hierarchy too; the layer's output
  value is detached into a leaf that requires grad, inside the graph, and returned beside the
  model's output.

A tap returns ``(raw model output, activation)``: no autograd graph is recorded before the layer,
one is recorded from the activation on, so Grad-CAM costs about one forward pass.
"""

from __future__ import annotations

import contextlib
import functools
import re
import threading
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from types import FunctionType
from typing import Any, cast

import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

from .attention_rows import ATTENTION_ROWS_OP, attention_rows, plain_attention_call
from .errors import GradientUnavailableError, ModelInputError
from .token_rows import ROWS_OPS, rows_call

MIN_USEFUL_MAP = 4  # common practice: coarser maps make every region cover most of the image
_MAX_PREFIX_GUESS = 5  # a class token plus up to four register tokens


class DegenerateMapWarning(UserWarning):
    """The Grad-CAM layer's map is too coarse for regions to mean anything."""


@dataclass(frozen=True)
class TokenGrid:
    """Patch tokens of a transformer layer: ``prefix`` class/register tokens, then rows x cols patches."""

    prefix: int
    rows: int
    cols: int


@dataclass(frozen=True)
class LayerInfo:
    """One layer as seen on a probe batch: its per-image output shape and the map Grad-CAM would give."""

    name: str
    module_type: str
    shape: tuple[int, ...]  # one image's output, without the batch dimension
    map_size: tuple[int, int] | None  # (h, w), None when the output is neither a map nor a patch grid
    grid: TokenGrid | None = None

    def describe(self) -> str:
        size = f"{self.map_size[0]}x{self.map_size[1]}" if self.map_size else "-"
        extra = f", tokens: {self.grid.prefix} prefix + {self.grid.rows}x{self.grid.cols}" if self.grid else ""
        return f"{self.name} ({self.module_type}) output {list(self.shape)}, map {size}{extra}"


Tap = Callable[[torch.Tensor], "Tapped"]


def infer_token_grid(n_tokens: int, input_size: tuple[int, int], *, grid: tuple[int, int] | None = None, prefix: int | None = None) -> TokenGrid | None:
    """The patch grid of ``n_tokens`` tokens for an input of ``input_size`` (h, w), or None.

    Stated values win: ``grid`` (rows, cols) and/or ``prefix``. Otherwise the grid must have the
    input's aspect ratio with a whole patch size, after at most five leading class/register tokens.
    """
    h, w = input_size
    if grid is not None:
        rest = n_tokens - grid[0] * grid[1]
        if rest < 0 or (prefix is not None and rest != prefix):
            return None
        return TokenGrid(rest, grid[0], grid[1])
    prefixes = [prefix] if prefix is not None else list(range(_MAX_PREFIX_GUESS + 1))
    for k in prefixes:
        n = n_tokens - k
        if n <= 0:
            continue
        for rows in range(1, n + 1):
            if n % rows:
                continue
            cols = n // rows
            if rows * w == cols * h and h % rows == 0 and w % cols == 0 and h // rows == w // cols:
                return TokenGrid(k, rows, cols)
    return None


def _info(name: str, module_type: str, value: object, input_size: tuple[int, int], grid: tuple[int, int] | None, prefix: int | None) -> LayerInfo | None:
    if not isinstance(value, torch.Tensor) or value.ndim not in (3, 4):
        return None
    shape = tuple(int(s) for s in value.shape[1:])
    if value.ndim == 4:
        return LayerInfo(name, module_type, shape, (shape[1], shape[2]))
    tokens = infer_token_grid(shape[0], input_size, grid=grid, prefix=prefix)
    return LayerInfo(name, module_type, shape, (tokens.rows, tokens.cols) if tokens else None, tokens)


# A global spatial pooling and the sum over the map of d(pooled)/d(activation) for one channel:
# 1 for a mean or a maximum (ties share it), h*w for a sum.
_GLOBAL_POOLS = {"mean": "one", "amax": "one", "sum": "area", "adaptive_avg_pool2d": "one", "_adaptive_avg_pool2d": "one"}


def _op_name(func: object) -> str:
    name = str(getattr(func, "__name__", ""))
    return name.split(".", 1)[0]  # an exported graph's aten overloads are named like "amax.default"


def _global_pool(func: object, args: tuple[object, ...], kwargs: dict[str, object]) -> tuple[str, str] | None:
    """For a global spatial pooling of a map (mean, amax, sum over h and w, adaptive average pooling
    to 1x1): its kind ("mean", "amax" or "sum"; adaptive pooling is a mean) and the sum over the map
    of d(pooled)/d(map) per channel: "one", or "area" (h*w) for a sum. None for anything else."""
    name = _op_name(func)
    if name not in _GLOBAL_POOLS or not args or not isinstance(args[0], torch.Tensor) or args[0].ndim != 4:
        return None
    if name in ("adaptive_avg_pool2d", "_adaptive_avg_pool2d"):
        size = args[1] if len(args) > 1 else kwargs.get("output_size")
        return ("mean", "one") if size in (1, (1, 1), [1, 1]) else None
    dims = args[1] if len(args) > 1 else kwargs.get("dim")
    if isinstance(dims, int):
        return None
    if not isinstance(dims, (tuple, list)) or not all(isinstance(d, int) for d in dims):
        return None
    if sorted(d % 4 for d in dims) != [2, 3]:
        return None
    return name, _GLOBAL_POOLS[name]


class _SpreadPooled(torch.autograd.Function):
    """A global mean or sum pooling of a map whose backward hands the pooled gradient back as a
    broadcast view over h x w. torch's own backward writes that gradient out in full first (an
    activation-sized pass per batch); the next operation's backward reads the view as it reads a
    full tensor, so the gradient is the same (to the last bit through a ReLU or an addition; an
    elementwise backward kernel may round a broadcast input differently, as SiLU's does by ~1e-16)."""

    @staticmethod
    def forward(ctx: Any, x: torch.Tensor, pool: Callable[[torch.Tensor], torch.Tensor], area: int) -> torch.Tensor:
        ctx.shape, ctx.dtype, ctx.area = x.shape, x.dtype, area
        return pool(x)

    @staticmethod
    def backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None, None]:
        n, c, h, w = ctx.shape
        spread = grad.reshape(n, c, 1, 1).to(ctx.dtype)
        if ctx.area != 1:
            spread = spread / ctx.area  # as torch's mean backward divides the spread gradient
        return spread.expand(n, c, h, w), None, None


SPREAD_MEAN_OP = "heedmap::spread_mean"  # called from edited TorchScript graphs


@torch.library.custom_op(SPREAD_MEAN_OP, mutates_args=())
def _spread_mean_op(x: torch.Tensor, dim: list[int], keepdim: bool, adaptive: bool) -> torch.Tensor:
    """A mean over ``dim`` (``adaptive``: torch's adaptive average pooling to 1x1, the same mean over
    the last two dimensions) whose backward is :class:`_SpreadPooled`'s broadcast view."""
    if adaptive:
        return F.adaptive_avg_pool2d(x, 1)
    return x.mean(dim, keepdim)


@_spread_mean_op.register_fake
def _(x: torch.Tensor, dim: list[int], keepdim: bool, adaptive: bool) -> torch.Tensor:
    return F.adaptive_avg_pool2d(x, 1) if adaptive else x.mean(dim, keepdim)


def _spread_mean_setup(ctx: Any, inputs: tuple[object, ...], output: torch.Tensor) -> None:
    x, dim, keepdim, adaptive = cast(tuple[torch.Tensor, list[int], bool, bool], inputs)  # the op's schema
    ctx.shape, ctx.dtype = x.shape, x.dtype
    ctx.dims = sorted({d % x.ndim for d in ([-2, -1] if adaptive else (dim or range(x.ndim)))})  # [] is every dimension, as torch's mean
    ctx.keepdim = bool(keepdim or adaptive)


def _spread_mean_backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None, None, None]:
    if not ctx.keepdim:
        for d in ctx.dims:
            grad = grad.unsqueeze(d)
    count = 1
    for d in ctx.dims:
        count *= ctx.shape[d]
    return (grad.to(ctx.dtype) / count).expand(ctx.shape), None, None, None


_spread_mean_op.register_autograd(_spread_mean_backward, setup_context=_spread_mean_setup)


def _spread_pool(func: Any, args: tuple[object, ...], kwargs: dict[str, object], found: tuple[str, str]) -> torch.Tensor | None:
    """A global mean/sum pooling (``found`` by :func:`_global_pool`) of a map that records gradients,
    run as :class:`_SpreadPooled`; None otherwise (an amax keeps torch's backward, which picks its positions)."""
    x = args[0]
    if found[0] == "amax" or not isinstance(x, torch.Tensor) or not x.requires_grad or not torch.is_grad_enabled():
        return None
    area = x.shape[2] * x.shape[3] if found[0] == "mean" else 1
    rest = args[1:]
    result: torch.Tensor = _SpreadPooled.apply(x, lambda t: func(t, *rest, **kwargs), area)  # type: ignore[no-untyped-call]
    return result


_MAX_UNBIND = 4  # q, k, v (or k, v) of a packed projection; a longer dimension keeps torch's select


def _select_parts(name: str, args: tuple[object, ...], kwargs: dict[str, object], parts: dict[tuple[int, int], tuple[torch.Tensor, tuple[torch.Tensor, ...], int]]) -> torch.Tensor | None:
    """``x.select(dim, i)`` (or ``x[i]``) on a short dimension of a tensor that records gradients, as
    the i-th part of one ``x.unbind(dim)`` shared by every such select of ``x``: the same views, but
    one backward step stacks the parts' gradients, where each select's backward writes a zero
    tensor the size of ``x`` and the three are then added (as for q, k and v of attention's packed
    projection). None when the call is not one. A part taken before ``x`` is changed in place and used
    after it is refused by autograd (a view of an unbind whose base changed), where torch's own
    select would pass; a later select unbinds the changed ``x`` again."""
    x: object
    dim: object
    index: object
    if name == "__getitem__" and len(args) == 2 and not kwargs:
        x, dim, index = args[0], 0, args[1]
    elif name == "select" and len(args) == 3 and not kwargs:
        x, dim, index = args
    else:
        return None
    if not isinstance(x, torch.Tensor) or type(dim) is not int or type(index) is not int or not x.requires_grad or not torch.is_grad_enabled():
        return None
    if not -x.ndim <= dim < x.ndim:
        return None
    dim %= x.ndim
    if not 2 <= x.shape[dim] <= _MAX_UNBIND or not -x.shape[dim] <= index < x.shape[dim]:
        return None
    key = (id(x), dim)
    held = parts.get(key)
    if held is None or held[2] != x._version:  # x changed in place since its unbind: its parts are stale, unbind it again
        held = parts[key] = (x, torch.unbind(x, dim), x._version)  # x is kept, so its id stays its own
    return held[1][index]


def _attention_with_rows(*args: Any, **kwargs: Any) -> torch.Tensor:
    """``scaled_dot_product_attention`` with the row-sparse backward where the call is the plain case
    and something in it requires grad; torch's own otherwise."""
    call = plain_attention_call(args, kwargs)
    if call is not None and torch.is_grad_enabled() and any(t.requires_grad for t in call[:3]):
        q, k, v, scale = call
        return attention_rows(q, k, v, scale=scale)
    return F.scaled_dot_product_attention(*args, **kwargs)


def _in_projection_unbound(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, w: torch.Tensor, b: torch.Tensor | None = None) -> list[torch.Tensor]:
    """torch's packed in-projection of self-attention, its q, k, v taken with one ``unbind`` instead
    of a select each (see :func:`_select_parts`: the same values, a cheaper backward); other
    attention (k or v not the query) goes to torch's own."""
    if not (q is k and k is v):
        packed: Callable[..., list[torch.Tensor]] = F._in_projection_packed  # type: ignore[attr-defined]  # private in the stubs
        return packed(q, k, v, w, b)
    proj = F.linear(q, w, b)
    e = q.size(-1)
    proj = proj.view(*proj.shape[:-1], 3, e).unsqueeze(0).transpose(0, -2).squeeze(-2).contiguous()
    return list(proj.unbind(0))


def _linear_maybe_rows(*args: Any, **kwargs: Any) -> torch.Tensor:
    """``F.linear`` with the row-sparse backward (:func:`analysis.token_rows.rows_call`) where it applies. The
    attention function calls its output projection on (tokens x batch) x features: seen as one sequence of rows."""
    x = args[0] if args else None
    if isinstance(x, torch.Tensor) and x.ndim == 2 and not kwargs and len(args) in (2, 3):
        found = rows_call("linear", (x.unsqueeze(0), *args[1:]), {})
        if found is not None:
            return found.squeeze(0)
    found = rows_call("linear", args, kwargs)
    return F.linear(*args, **kwargs) if found is None else found


@functools.cache
def _mha_with_rows() -> Callable[..., Any] | None:
    """torch's ``F.multi_head_attention_forward`` (what ``nn.MultiheadAttention`` runs when it records
    gradients) calling :func:`_attention_with_rows` for its attention; None if its code has changed shape.

    A copy of the function with two names of its module rebound, not a patch of torch: other
    callers and threads are unaffected. Its override check is off in the copy because the copy is
    only called from :class:`_Tail`'s own handler of that function.
    """
    fn = F.multi_head_attention_forward
    code = getattr(fn, "__code__", None)
    if code is None or not {"scaled_dot_product_attention", "has_torch_function"} <= set(code.co_names):
        return None
    names = dict(fn.__globals__)
    names["scaled_dot_product_attention"] = _attention_with_rows
    names["has_torch_function"] = lambda *_args: False
    if "linear" in code.co_names:  # the output projection: row-sparse below a class-token head (the in-projection stays torch's)
        names["linear"] = _linear_maybe_rows
    if "_in_projection_packed" in code.co_names:
        names["_in_projection_packed"] = _in_projection_unbound
    copy = FunctionType(code, names, fn.__name__, fn.__defaults__, fn.__closure__)
    copy.__kwdefaults__ = fn.__kwdefaults__
    return copy


class _Tail(TorchFunctionMode):
    """Active after the tapped layer, while the rest of the forward pass records gradients.

    * A global spatial pooling of a map activation becomes a leaf of its own: Grad-CAM needs only
      the spatial sum of d logit / d activation per channel; through a global pooling that sum is
      d logit / d pooled (times h*w for a sum, whatever positions an amax ties on), so the backward
      pass stops at the pooled N x C values and never makes a gradient map. Other uses of the
      activation are differentiated as usual and the two parts add up.
    * A global mean or sum pooling of a later map hands its gradient back as a broadcast view
      (:class:`_SpreadPooled`), not written out over the map.
    * Attention runs as :func:`analysis.attention_rows.attention_rows`, whose backward works only on
      the query rows that carry gradient (one, below a class-token head's last attention); the
      selects that split a packed q, k, v projection share one ``unbind`` (:func:`_select_parts`).
    * Linear layers, GELU and layer norms over the last dimension run with a backward that works only
      on the rows (tokens) that carry gradient (:mod:`analysis.token_rows`).
    """

    def __init__(self, activation: torch.Tensor) -> None:
        super().__init__()
        self.activation = activation
        self.pooled: list[tuple[torch.Tensor, str]] = []
        self.parts: dict[tuple[int, int], tuple[torch.Tensor, tuple[torch.Tensor, ...], int]] = {}

    def __torch_function__(self, func: Any, types: Any, args: tuple[object, ...] = (), kwargs: dict[str, object] | None = None) -> Any:
        kwargs = kwargs or {}
        name = _op_name(func)
        if name == "scaled_dot_product_attention":
            return _attention_with_rows(*args, **kwargs)
        if func is F.multi_head_attention_forward:
            mha: Callable[..., Any] = _mha_with_rows() or func
            return mha(*args, **kwargs)
        if name in ROWS_OPS:
            rows = rows_call(name, args, kwargs)
            if rows is not None:
                return rows
        pool = _global_pool(func, args, kwargs) if name in _GLOBAL_POOLS else None
        if pool is not None and args[0] is self.activation:
            with torch.no_grad():
                value = func(self.activation.detach(), *args[1:], **kwargs)
            leaf = value.requires_grad_(True)
            self.pooled.append((leaf, pool[1]))
            return leaf
        found = _spread_pool(func, args, kwargs, pool) if pool is not None else _select_parts(name, args, kwargs, self.parts)
        return func(*args, **kwargs) if found is None else found


@dataclass(frozen=True)
class Tapped:
    """One forward through a tap: the model's raw output, the layer's activation (a leaf that requires
    grad) and leaves made by global poolings of it, with their scale (see :func:`channel_gradient`)."""

    out: object
    activation: torch.Tensor
    pooled: tuple[tuple[torch.Tensor, str], ...] = ()

    def leaves(self) -> list[torch.Tensor]:
        return [self.activation, *(leaf for leaf, _ in self.pooled)]


def channel_gradient(tapped: Tapped, target: torch.Tensor, grid: TokenGrid | None, *, seed: torch.Tensor | None = None) -> tuple[torch.Tensor | None, torch.Tensor | None]:
    """(alpha, full gradient) for ``target`` (a scalar, or weighted by ``seed`` of its shape): alpha is
    the Grad-CAM weight per channel, the spatial mean of d target / d activation (N x C; patch tokens
    only for a token grid). The full gradient map is None when every path from the layer went through
    a global pooling. Both None when the target does not depend on the layer."""
    grads = torch.autograd.grad(target, tapped.leaves(), grad_outputs=seed, allow_unused=True)
    full = grads[0]
    alpha: torch.Tensor | None = None
    if full is not None:
        alpha = full[:, grid.prefix :, :].mean(dim=1) if grid is not None else full.mean(dim=(2, 3))
    if tapped.pooled:
        h, w = tapped.activation.shape[2], tapped.activation.shape[3]
        for (_leaf, scale), g in zip(tapped.pooled, grads[1:]):
            if g is None:
                continue
            part = g.reshape(g.shape[0], -1) if scale == "area" else g.reshape(g.shape[0], -1) / (h * w)
            alpha = part if alpha is None else alpha + part
    return alpha, full


def _ordinary(tensor: torch.Tensor) -> torch.Tensor:
    """An ordinary tensor over the same memory as ``tensor`` (an inference tensor cannot take part in
    autograd; this alias can, and costs no copy)."""
    if not tensor.is_inference():
        return tensor
    with torch.inference_mode(False):
        return torch.empty(0, dtype=tensor.dtype, device=tensor.device).set_(tensor.untyped_storage(), tensor.storage_offset(), tensor.size(), tensor.stride())


def _inference_conflict(exc: RuntimeError) -> bool:
    """Whether ``exc`` is autograd refusing a tensor made in inference mode (saved for backward, or
    changed in place after the layer)."""
    return "nference tensor" in str(exc)


class HookTap:
    """Tap by a forward hook on ``layer``: no autograd before it, a graph from its output on.

    The part before the layer runs in inference mode, as plain batched inference does (the lighter
    way through torch's dispatcher, which matters for models of many small operations); the layer's
    output is then aliased as an ordinary tensor, without a copy, and the rest of the forward pass
    records gradients. A model that uses a tensor from before the layer in a way autograd must
    save (a product with the tapped map, an in-place change) is refused that by torch; the tap
    then runs it again with gradients merely switched off before the layer, and keeps doing so.
    """

    def __init__(self, module: nn.Module, layer: nn.Module, name: str) -> None:
        self.module, self.layer, self.name = module, layer, name
        self.inference = True  # False once the model has shown it needs ordinary tensors before the layer

    def __call__(self, x: torch.Tensor) -> Tapped:
        if self.inference:
            try:
                return self._run(x, inference=True)
            except RuntimeError as exc:
                if not _inference_conflict(exc):
                    raise
                self.inference = False
        return self._run(x, inference=False)

    def _run(self, x: torch.Tensor, *, inference: bool) -> Tapped:
        captured: list[torch.Tensor] = []
        modes: list[_Tail] = []
        name = self.name
        after = contextlib.ExitStack()
        caller = threading.get_ident()

        def hook(_module: nn.Module, _inputs: object, output: object) -> torch.Tensor | None:
            # The hook sits on a module shared by every thread: a forward running in another thread at
            # the same time (the saliency job computes two batches at once) passes through untouched.
            if threading.get_ident() != caller:
                return None
            if captured:
                raise GradientUnavailableError(f"layer {name!r} runs more than once in one forward pass; choose a layer that runs once.")
            if not isinstance(output, torch.Tensor) or output.ndim not in (3, 4):
                shape = f" of shape {tuple(output.shape)}" if isinstance(output, torch.Tensor) else ""
                raise GradientUnavailableError(
                    f"layer {name!r} must give an N x C x h x w feature map or N x tokens x dim; it gave {type(output).__name__}{shape}. "
                    "Choose another layer ('heedmap layers' lists them)."
                )
            after.enter_context(torch.inference_mode(False))  # record the graph from here on, for this forward only
            after.enter_context(torch.enable_grad())
            activation = _ordinary(output.detach()).requires_grad_(True)
            captured.append(activation)
            mode = _Tail(activation)
            after.enter_context(mode)
            modes.append(mode)
            return activation

        handle = self.layer.register_forward_hook(hook)
        try:
            with torch.inference_mode() if inference else torch.no_grad():
                try:
                    out = self.module(x)
                finally:
                    after.close()
        finally:
            handle.remove()
        if not captured:
            raise GradientUnavailableError(f"layer {name!r} did not run in the forward pass; check 'target_layer'.")
        return Tapped(out, captured[0], tuple(modes[0].pooled) if modes else ())


def freeze(module: nn.Module) -> None:
    """Parameters need no gradient here: Grad-CAM differentiates by the activation only, and a parameter that
    requires grad makes every layer after the tap compute its weight's gradient too (as many matrix products
    again as its input's gradient)."""
    for p in module.parameters():
        p.requires_grad_(False)


class EagerGraph:
    """Layers of an eager module, by ``named_modules`` path, in the order their outputs complete."""

    kind = "eager"

    def __init__(self, module: nn.Module) -> None:
        self.module = module
        self.captured: tuple[object, dict[str, object]] | None = None  # the last layers() pass, recorded for autograd

    def layers(self, probe: torch.Tensor, *, input_size: tuple[int, int], grid: tuple[int, int] | None = None, prefix: int | None = None) -> list[LayerInfo]:
        calls: dict[str, int] = {}
        seen: list[tuple[str, str, object]] = []
        handles = []
        for name, mod in self.module.named_modules():
            if not name or isinstance(mod, torch.jit.ScriptModule):
                continue

            def hook(m: nn.Module, _i: object, out: object, name: str = name) -> None:
                calls[name] = calls.get(name, 0) + 1
                seen.append((name, type(m).__name__, out))

            handles.append(mod.register_forward_hook(hook))
        try:
            with torch.enable_grad():  # recorded, so the default layer's search differentiates this same pass
                result = self.module(_grad_probe(probe))
        finally:
            for h in handles:
                h.remove()
        self.captured = (result, {name: out for name, _, out in seen if calls[name] == 1})
        infos = []
        for name, mtype, out in seen:
            if calls[name] != 1:
                continue
            info = _info(name, mtype, out, input_size, grid, prefix)
            if info is not None:
                infos.append(info)
        return infos

    def names(self) -> list[str]:
        return [n for n, _ in self.module.named_modules() if n]

    def capture(self, probe: torch.Tensor, names: set[str]) -> tuple[object, dict[str, object]]:
        """The model's output and the named layers' outputs, in one forward (as the caller's grad mode records it)."""
        values: dict[str, object] = {}
        handles = []
        for name, mod in self.module.named_modules():
            if name in names:
                handles.append(mod.register_forward_hook(lambda _m, _i, out, name=name: values.setdefault(name, out)))
        try:
            out = self.module(probe)
        finally:
            for h in handles:
                h.remove()
        return out, values

    def tap(self, name: str) -> tuple[Tap, nn.Module | None]:
        try:
            layer = self.module.get_submodule(name)
        except AttributeError:
            raise ModelInputError(f"target layer {name!r} is not a submodule of the model.") from None
        return HookTap(self.module, layer, name), layer


def _fx_paths(node: torch.fx.Node) -> list[tuple[str, str]]:
    stack = node.meta.get("nn_module_stack") or {}
    out = []
    for value in stack.values():
        path, mtype = value[0], value[1]
        if path:
            out.append((str(path), str(mtype).rsplit(".", 1)[-1] if isinstance(mtype, str) else getattr(mtype, "__name__", str(mtype))))
    return out


class FxGraph:
    """Layers of an exported program's module, found from each node's module stack."""

    kind = "exported"

    def __init__(self, gm: torch.fx.GraphModule) -> None:
        self.module = gm
        self.captured: tuple[object, dict[str, object]] | None = None  # the last layers() pass, recorded for autograd
        self._taps: dict[str, str] = {}
        self._outputs = self._layer_outputs()

    def _layer_outputs(self) -> dict[str, tuple[torch.fx.Node, str, int]]:
        """Module path -> (the one node whose value leaves the module, module type, depth)."""
        members: dict[str, set[torch.fx.Node]] = {}
        types: dict[str, str] = {}
        for node in self.module.graph.nodes:
            if node.op != "call_function":
                continue
            for path, mtype in _fx_paths(node):
                members.setdefault(path, set()).add(node)
                types[path] = mtype
        outputs: dict[str, tuple[torch.fx.Node, str, int]] = {}
        for path, nodes in members.items():
            leaving = [n for n in nodes if any(u not in nodes for u in n.users)]
            if len(leaving) == 1:
                outputs[path] = (leaving[0], types[path], path.count(".") + 1)
        return outputs

    def names(self) -> list[str]:
        return list(self._outputs)

    def capture(self, probe: torch.Tensor, names: set[str]) -> tuple[object, dict[str, object]]:
        wanted = {node for path, (node, _, _) in self._outputs.items() if path in names}
        out, values = _run_recording(self.module, probe, wanted)
        return out, {path: values[node] for path, (node, _, _) in self._outputs.items() if path in names and node in values}

    def layers(self, probe: torch.Tensor, *, input_size: tuple[int, int], grid: tuple[int, int] | None = None, prefix: int | None = None) -> list[LayerInfo]:
        wanted = {node for node, _, _ in self._outputs.values()}
        with torch.enable_grad():  # recorded, so the default layer's search differentiates this same pass
            out, values = _run_recording(self.module, _grad_probe(probe), wanted)
        self.captured = (out, {path: values[node] for path, (node, _, _) in self._outputs.items() if node in values})
        order = {n: i for i, n in enumerate(self.module.graph.nodes)}
        # Execution order; a module ending on the same node as its child comes after it (outermost last).
        ranked = sorted(self._outputs.items(), key=lambda kv: (order[kv[1][0]], -kv[1][2]))
        infos = []
        for path, (node, mtype, _) in ranked:
            info = _info(path, mtype, values.get(node), input_size, grid, prefix)
            if info is not None:
                infos.append(info)
        return infos

    def tap(self, name: str) -> tuple[Tap, nn.Module | None]:
        if name not in self._outputs:
            raise ModelInputError(f"target layer {name!r} is not a module of the exported program, or its output is not one tensor.")
        if name not in self._taps:
            node = self._outputs[name][0]
            attr = f"heedmap_tap_{len(self._taps)}"
            self.module.add_submodule(attr, nn.Identity())
            with self.module.graph.inserting_after(node):
                tap_node = self.module.graph.call_module(attr, (node,))
            node.replace_all_uses_with(tap_node, delete_user_cb=lambda user: user is not tap_node)
            tap_node.meta.update({k: v for k, v in node.meta.items() if k in ("val", "nn_module_stack")})
            self.module.recompile()
            self._taps[name] = attr
        layer = self.module.get_submodule(self._taps[name])
        return HookTap(self.module, layer, name), layer


_HIERARCHY = re.compile(r"([^.()]+)\(([^()]*)\)")


_NON_COMPUTING = {"prim::Constant", "prim::GetAttr", "prim::ListConstruct", "prim::TupleConstruct", "prim::RaiseException", "prim::If", "prim::Loop"}


def _ts_parts(node: torch._C.Node) -> list[tuple[str, str]]:
    """(name, type) of each module the node ran inside, outermost first."""
    return [(n, t) for n, t in _HIERARCHY.findall(node.getModuleHierarchy() or "") if n not in ("UNKNOWN_INSTANCE", "SELF")]


class ScriptTap:
    """Runs a TorchScript graph edited to detach the layer's output into a leaf and return it too."""

    def __init__(self, fn: torch._C.ScriptFunction[..., Any], owner: torch._C.ScriptModule, name: str, scales: tuple[str, ...] = ()) -> None:
        self.fn, self.owner, self.name, self.scales = fn, owner, name, scales

    def __call__(self, x: torch.Tensor) -> Tapped:
        # Nothing before the leaf requires grad (parameters are frozen). Without the graph executor's
        # optimisation the layers after the tap are differentiated by eager autograd's kernels, not by
        # TorchScript's symbolic derivatives (several elementwise operations each, e.g. for SiLU).
        with torch.enable_grad(), torch.jit.optimized_execution(False):  # type: ignore[attr-defined]  # not re-exported in torch's stubs
            out, activation, *pooled = self.fn(self.owner, x)
        return Tapped(out, activation, tuple(zip(pooled, self.scales)))


def _ts_constant(value: torch._C.Value) -> object:
    node = value.node()
    if node.kind() == "prim::Constant":
        return value.toIValue()
    if node.kind() == "prim::ListConstruct" and all(i.node().kind() == "prim::Constant" for i in node.inputs()):
        return [i.toIValue() for i in node.inputs()]
    return None


def _ts_pool_scale(node: torch._C.Node) -> str | None:
    """The scale of a global spatial pooling node of a 4-d map (see :func:`_global_pool`), else None."""
    kind = node.kind().split("::", 1)[-1]
    inputs = list(node.inputs())
    if kind not in _GLOBAL_POOLS or len(inputs) < 2:
        return None
    arg = _ts_constant(inputs[1])
    if kind == "adaptive_avg_pool2d":
        return "one" if arg in (1, [1, 1]) else None
    if not isinstance(arg, list) or not all(isinstance(d, int) for d in arg) or sorted(d % 4 for d in arg) != [2, 3]:
        return None
    return _GLOBAL_POOLS[kind]


def _ts_tail_ops(graph: torch._C.Graph, block: torch._C.Block, leaf: torch._C.Value, seen: list[bool]) -> None:
    """Rewrite operations after the tap's ``leaf`` (``seen[0]`` turns True there; blocks inside nodes
    are walked in order), as :class:`_Tail` does for eager and exported models: plain attention
    calls run as ``heedmap::attention_rows``, whose backward works only on query rows that carry
    gradient (see :mod:`analysis.attention_rows`; the forward is the same attention), linear layers,
    GELU and layer norms as their :mod:`analysis.token_rows` operators (likewise), and means
    (and 1x1 adaptive average poolings) of later values run as ``heedmap::spread_mean``, whose
    backward hands back a broadcast view. Those before the leaf keep torch's operators: a
    Python-registered one costs more per call."""
    for node in list(block.nodes()):
        if node.outputsSize() == 1 and node.output().unique() == leaf.unique():
            seen[0] = True
        for inner in node.blocks():
            _ts_tail_ops(graph, inner, leaf, seen)
        if not seen[0] or node.outputsSize() != 1:
            continue
        if node.kind() == "aten::scaled_dot_product_attention":
            _ts_attention_node(graph, node)
        elif node.kind() in ("aten::mean", "aten::adaptive_avg_pool2d"):
            _ts_mean_node(graph, node, leaf)
        elif node.kind() in _TS_ROWS:
            _ts_rows_node(graph, node)


# aten node -> (our operator, how many of its inputs it takes): linear (input, weight, bias); gelu (input, approximate);
# layer_norm (input, normalized_shape, weight, bias, eps; cudnn_enable dropped).
_TS_ROWS = {"aten::linear": (ROWS_OPS["linear"], 3), "aten::gelu": (ROWS_OPS["gelu"], 2), "aten::layer_norm": (ROWS_OPS["layer_norm"], 5)}


def _ts_rows_node(graph: torch._C.Graph, node: torch._C.Node) -> None:
    """A linear layer, GELU or layer norm after the leaf as its :mod:`analysis.token_rows` operator (the same
    forward; a backward over the token rows that carry gradient)."""
    op, taken = _TS_ROWS[node.kind()]
    inputs = list(node.inputs())
    if len(inputs) < taken:
        return
    rows = graph.create(op, inputs[:taken], 1)
    rows.insertBefore(node)
    rows.output().setType(node.output().type())
    node.output().replaceAllUsesWith(rows.output())
    node.destroy()


def _ts_attention_node(graph: torch._C.Graph, node: torch._C.Node) -> None:
    inputs = list(node.inputs())
    if len(inputs) not in (7, 8):
        return
    constants = [_ts_constant(v) if v.node().kind() == "prim::Constant" else "not constant" for v in inputs[3:]]
    mask, causal = constants[0], constants[2]
    gqa = constants[4] if len(constants) > 4 else False
    if mask is not None or causal is not False or gqa is not False:  # dropout is 0 in eval mode, checked when run
        return
    rows = graph.create(ATTENTION_ROWS_OP, [inputs[0], inputs[1], inputs[2], inputs[6], inputs[4]], 2)
    rows.insertBefore(node)
    rows.outputsAt(0).setType(node.output().type())
    rows.outputsAt(1).setType(node.output().type())
    node.output().replaceAllUsesWith(rows.outputsAt(0))
    node.destroy()


def _ts_mean_node(graph: torch._C.Graph, node: torch._C.Node, leaf: torch._C.Value) -> None:
    """``aten::mean(x, dims, keepdim, None)`` or ``aten::adaptive_avg_pool2d(x, [1, 1])`` of a value
    other than the leaf (whose poolings are leaves of their own) as ``heedmap::spread_mean``."""
    inputs = list(node.inputs())
    if inputs[0].unique() == leaf.unique():
        return
    if node.kind() == "aten::adaptive_avg_pool2d":
        if len(inputs) != 2 or _ts_constant(inputs[1]) not in ([1, 1], 1):
            return
        made = [graph.insertConstant([-2, -1]), graph.insertConstant(True), graph.insertConstant(True)]  # type: ignore[attr-defined]
        dims, keepdim, adaptive = made
    else:
        if len(inputs) != 4 or not isinstance(_ts_constant(inputs[1]), list) or not isinstance(_ts_constant(inputs[2]), bool):
            return
        if not _ts_constant(inputs[1]):  # mean(x, []) is a mean over every dimension: torch's own, not a pooling
            return
        if inputs[3].node().kind() != "prim::Constant" or _ts_constant(inputs[3]) is not None:  # a dtype: torch's mean
            return
        made = [graph.insertConstant(False)]  # type: ignore[attr-defined]
        dims, keepdim, adaptive = inputs[1], inputs[2], made[0]
    for value in made:
        value.node().moveBefore(node)
    spread = graph.create(SPREAD_MEAN_OP, [inputs[0], dims, keepdim, adaptive], 1)
    spread.insertBefore(node)
    spread.output().setType(node.output().type())
    node.output().replaceAllUsesWith(spread.output())
    node.destroy()


def _ts_leaf_after(graph: torch._C.Graph, value: torch._C.Value) -> torch._C.Value:
    """Detach ``value`` into a leaf that requires grad, used wherever ``value`` was."""
    det = graph.create("aten::detach", [value], 1)
    det.insertAfter(value.node())
    flag = graph.insertConstant(True)  # type: ignore[attr-defined]  # missing from torch's stubs
    flag.node().moveAfter(det)
    leaf = graph.create("aten::requires_grad_", [det.output(), flag], 1)
    leaf.insertAfter(flag.node())
    leaf.output().setType(value.type())
    value.replaceAllUsesWith(leaf.output())
    det.replaceInput(0, value)  # the line above also redirected the detach itself
    return leaf.output()


class ScriptGraph:
    """Layers of a TorchScript module, found from the module hierarchy of its inlined graph's nodes."""

    kind = "torchscript"

    def __init__(self, scripted: torch.jit.ScriptModule) -> None:
        self.module = scripted
        self.captured: tuple[object, dict[str, object]] | None = None  # the last layers() pass, recorded for autograd
        self._ranks: dict[str, int] = {}
        self._taps: dict[str, tuple[Tap, nn.Module | None]] = {}
        freeze(scripted)

    def _graph_outputs(self) -> tuple[torch._C.Graph, dict[str, tuple[torch._C.Value, str, int, int]]]:
        """Module path -> (its output value, module type, node index, depth) in a fresh inlined graph.

        A module's output is the value of the last computing node that ran inside it (TorchScript
        leaves some of a module's control-flow nodes without a hierarchy, so "values leaving the
        module" cannot be trusted); when that node gives a tuple or a list, the module has no single output.
        """
        graph = self.module.inlined_graph
        last: dict[str, tuple[int, torch._C.Node]] = {}
        types: dict[str, str] = {}
        for i, node in enumerate(graph.nodes()):
            if node.kind() in _NON_COMPUTING:
                continue
            parts = _ts_parts(node)
            for k in range(1, len(parts) + 1):
                prefix = ".".join(n for n, _ in parts[:k])
                last[prefix] = (i, node)
                types[prefix] = parts[k - 1][1]
        outputs: dict[str, tuple[torch._C.Value, str, int, int]] = {}
        for path, (i, node) in last.items():
            if node.outputsSize() == 1 and isinstance(node.output().type(), torch._C.TensorType):
                outputs[path] = (node.output(), types.get(path, ""), i, path.count(".") + 1)
        return graph, outputs

    def names(self) -> list[str]:
        return list(self._graph_outputs()[1])

    def _function(self, graph: torch._C.Graph, extra: list[torch._C.Value]) -> torch._C.ScriptFunction[..., Any]:
        ret = graph.return_node()
        original = ret.input()
        tup = graph.create("prim::TupleConstruct", [original, *extra], 1)
        tup.insertBefore(ret)
        tup.output().setType(torch._C.TupleType([original.type(), *[v.type() for v in extra]]))
        ret.replaceInput(0, tup.output())
        return torch._C._create_function_from_graph("heedmap_tapped", graph)

    def capture(self, probe: torch.Tensor, names: set[str]) -> tuple[object, dict[str, object]]:
        graph, outputs = self._graph_outputs()
        paths = [p for p in outputs if p in names]
        values = list(dict.fromkeys(outputs[p][0] for p in paths))
        fn = self._function(graph, values)
        with torch.jit.optimized_execution(False):  # type: ignore[attr-defined]  # not re-exported in torch's stubs
            result = fn(self.module._c, probe)
        by_value = dict(zip(values, result[1:]))
        return result[0], {p: by_value[outputs[p][0]] for p in paths}

    def layers(self, probe: torch.Tensor, *, input_size: tuple[int, int], grid: tuple[int, int] | None = None, prefix: int | None = None) -> list[LayerInfo]:
        graph, outputs = self._graph_outputs()
        ranked = sorted(outputs.items(), key=lambda kv: (kv[1][2], -kv[1][3]))
        values = list(dict.fromkeys(v for _, (v, _, _, _) in ranked))
        fn = self._function(graph, values)
        with torch.enable_grad(), torch.jit.optimized_execution(False):  # type: ignore[attr-defined]  # not re-exported in torch's stubs
            result = fn(self.module._c, _grad_probe(probe))  # recorded, so the default layer's search differentiates this same pass
        by_value = dict(zip(values, result[1:]))
        self.captured = (result[0], {path: by_value[v] for path, (v, _, _, _) in ranked})
        infos = []
        for path, (value, mtype, _, _) in ranked:
            got = by_value[value]
            if isinstance(got, torch.Tensor):
                self._ranks[path] = got.ndim
            info = _info(path, mtype, by_value[value], input_size, grid, prefix)
            if info is not None:
                infos.append(info)
        return infos

    def tap(self, name: str) -> tuple[Tap, nn.Module | None]:
        if name not in self._taps:
            self._taps[name] = self._make_tap(name)
        return self._taps[name]

    def _make_tap(self, name: str) -> tuple[Tap, nn.Module | None]:
        graph, outputs = self._graph_outputs()
        if name not in outputs:
            raise ModelInputError(f"target layer {name!r} is not a module of the TorchScript model, or its output is not one tensor.")
        leaf = _ts_leaf_after(graph, outputs[name][0])
        pooled: list[torch._C.Value] = []
        scales: list[str] = []
        if self._ranks.get(name) == 4:  # global poolings of the map become leaves of their own (see _Tail)
            for use in list(leaf.uses()):
                scale = _ts_pool_scale(use.user) if use.offset == 0 else None
                if scale is not None and use.user.outputsSize() == 1:
                    pooled.append(_ts_leaf_after(graph, use.user.output()))
                    scales.append(scale)
        _ts_tail_ops(graph, graph.block(), leaf, [False])
        fn = self._function(graph, [leaf, *pooled])
        return ScriptTap(fn, self.module._c, name, tuple(scales)), None


ModelGraph = EagerGraph | FxGraph | ScriptGraph


def _run_recording(module: torch.fx.GraphModule, probe: torch.Tensor, wanted: set[torch.fx.Node]) -> tuple[object, dict[torch.fx.Node, object]]:
    """Run the graph once, keeping the value of each wanted node (one pass serves every layer asked about)."""
    values: dict[torch.fx.Node, object] = {}

    class Recorder(torch.fx.Interpreter):
        def run_node(self, n: torch.fx.Node) -> object:
            result = super().run_node(n)
            if n in wanted:
                values[n] = result
            return result

    return Recorder(module).run(probe), values


def _grad_probe(probe: torch.Tensor) -> torch.Tensor:
    """The probe as an input that requires grad, so a forward records every layer's output (even
    TorchScript's, whose parameters are frozen) and the default layer's search can differentiate it."""
    return probe.detach().requires_grad_(True).clone()  # not a leaf: forward() may change its input in place


def select_logits(out: object, output: str | int | None) -> torch.Tensor:
    """The logits tensor in a model's output: itself, ``out[key]`` of a dict, ``out[index]`` of a tuple."""
    if isinstance(out, torch.Tensor):
        if output not in (None, 0):
            raise ModelInputError(f"the model returns one tensor, but the sidecar's 'output' is {output!r}; remove 'output'.")
        return out
    if isinstance(out, dict):
        keys = list(out)
        if output is None:
            raise ModelInputError(f"the model returns a dict with keys {keys}; state which holds the logits in the sidecar, e.g. \"output\": \"{keys[0] if keys else 'logits'}\".")
        if output not in out:
            raise ModelInputError(f"the sidecar's 'output' is {output!r}, but the model's output has the keys {keys}.")
        value = out[output]
    elif isinstance(out, (tuple, list)):
        index = 0 if output is None else output
        if not isinstance(index, int) or not -len(out) <= index < len(out):
            raise ModelInputError(f"the model returns a tuple of {len(out)}; the sidecar's 'output' must be an index 0..{len(out) - 1}; got {output!r}.")
        value = out[index]
    else:
        raise ModelInputError(f"the model must return a logits tensor, a dict or a tuple; it returned {type(out).__name__}.")
    if not isinstance(value, torch.Tensor):
        raise ModelInputError(f"the model's output {output!r} is a {type(value).__name__}, not a logits tensor.")
    return value


def cam_inputs(activation: torch.Tensor, grads: torch.Tensor, grid: TokenGrid | None) -> tuple[torch.Tensor, torch.Tensor]:
    """Activation and gradient as N x C x h x w maps: tokens lose their prefix and become the patch grid."""
    if grid is None:
        return activation, grads
    n, _, d = activation.shape

    def to_map(t: torch.Tensor) -> torch.Tensor:
        return t[:, grid.prefix :, :].reshape(n, grid.rows, grid.cols, d).permute(0, 3, 1, 2)

    return to_map(activation), to_map(grads)


def layer_has_gradient(tap: Tap, probe: torch.Tensor, output: str | int | None, grid: TokenGrid | None) -> bool:
    """Whether the top class's logit has a non-zero gradient on the layer's map for the probe batch."""
    tapped = tap(probe)
    logits = select_logits(tapped.out, output)
    if not logits.requires_grad:
        return False
    pred = logits.detach().argmax(dim=1)
    alpha, full = channel_gradient(tapped, logits.gather(1, pred[:, None]).sum(), grid)
    if full is not None:
        _, g = cam_inputs(tapped.activation.detach(), full, grid)
        if bool(torch.count_nonzero(g) > 0):
            return True
    return alpha is not None and bool(torch.count_nonzero(alpha) > 0)


def layers_reached(graph: ModelGraph, infos: list[LayerInfo], probe: torch.Tensor, output: str | int | None) -> set[str] | None:
    """Which of the layers the top class's logit has a non-zero gradient on, from one forward that
    records every layer's output and one backward pass; None when that pass fails (e.g. an in-place
    change of a layer's output), and the caller then tries layers one by one."""
    names = {i.name for i in infos}
    try:
        with torch.enable_grad():
            captured, graph.captured = graph.captured, None
            out, values = captured if captured is not None else graph.capture(_grad_probe(probe), names)
            logits = select_logits(out, output)
            if not logits.requires_grad:
                return None
            found = [(i, v) for i in infos if isinstance(v := values.get(i.name), torch.Tensor) and v.requires_grad]
            if not found:
                return set()
            pred = logits.detach().argmax(dim=1)
            grads = torch.autograd.grad(logits.gather(1, pred[:, None]).sum(), [v for _, v in found], allow_unused=True)
    except (RuntimeError, GradientUnavailableError, ModelInputError):
        return None
    reached = set()
    for (info, value), g in zip(found, grads):
        if g is not None and bool(torch.count_nonzero(cam_inputs(value.detach(), g, info.grid)[1]) > 0):
            reached.add(info.name)
    return reached


def choose_layer(graph: ModelGraph, infos: list[LayerInfo], probe: torch.Tensor, output: str | int | None) -> LayerInfo:
    """The default Grad-CAM layer: the last layer (before global pooling) whose map is at least 4x4 and
    that the predicted class's gradient reaches; failing that, the largest map that gradient reaches."""
    maps = [i for i in infos if i.map_size is not None]
    if not maps:
        raise ModelInputError(
            "no layer of this model gives a spatial map (N x C x h x w) or a grid of patch tokens; "
            "state 'target_layer' in the sidecar, or 'token_grid' for a transformer whose tokens do not form the input's grid."
        )
    useful = [i for i in maps if i.map_size is not None and min(i.map_size) >= MIN_USEFUL_MAP]
    by_area = sorted(enumerate(maps), key=lambda im: (-(im[1].map_size or (0, 0))[0] * (im[1].map_size or (0, 0))[1], -im[0]))
    failures: list[str] = []
    order = list({i.name: i for i in [*reversed(useful), *(i for _, i in by_area)]}.values())
    reached = layers_reached(graph, maps, probe, output)
    if reached:  # the first layer the gradient reaches is checked through its own tap (the path saliency takes)
        order = [i for i in order if i.name in reached]
    else:
        order = [*reversed(useful[-32:]), *(i for _, i in by_area[:8])]
    for info in order:
        tap, _ = graph.tap(info.name)
        try:
            if layer_has_gradient(tap, probe, output, info.grid):
                return info
        except (RuntimeError, GradientUnavailableError) as exc:  # e.g. an in-place operation after this layer
            failures.append(f"{info.name}: {str(exc).splitlines()[0][:160]}")
    raise GradientUnavailableError(
        "the predicted class's gradient reaches none of the model's spatial layers; forward() may detach its features, "
        "run under torch.no_grad() or change a layer's output in place (x.relu_()). State 'target_layer' in the sidecar "
        "if you know the layer." + (f" First failure: {failures[0]}" if failures else "")
    )


def coarse_map_warning(chosen: LayerInfo, infos: list[LayerInfo]) -> str | None:
    """A warning when the chosen layer's map is under 4x4, naming layers with larger maps; None otherwise."""
    if chosen.map_size is None or min(chosen.map_size) >= MIN_USEFUL_MAP:
        return None
    larger = [i for i in infos if i.map_size and i.map_size[0] * i.map_size[1] > chosen.map_size[0] * chosen.map_size[1]]
    useful = [i for i in larger if min(i.map_size or (0, 0)) >= MIN_USEFUL_MAP] or larger
    if useful:  # name the outermost layers (blocks, stages) nearest the output
        depth = min(i.name.count(".") for i in useful)
        useful = [i for i in useful if i.name.count(".") <= depth + 1]
    names = ", ".join(f"{i.name} ({i.map_size[0]}x{i.map_size[1]})" for i in reversed(useful[-4:]) if i.map_size)
    h, w = chosen.map_size
    text = (
        f"layer {chosen.name!r} gives a {h}x{w} map at this input size: every region would cover most of the image. "
    )
    if names:
        text += f"Layers with larger maps: {names}; set one as 'target_layer' in the sidecar."
    else:
        text += "No layer has a larger map; use a larger 'input_size' if the model allows it."
    return text


def warn_coarse(chosen: LayerInfo, infos: list[LayerInfo]) -> str | None:
    message = coarse_map_warning(chosen, infos)
    if message:
        warnings.warn(message, DegenerateMapWarning, stacklevel=3)
    return message
