"""Linear layers, layer norms and GELU whose backward pass works only on the rows (tokens) that carry gradient.

After a transformer's last attention, a class-token head differentiates one token per image: every
other token's row of the gradient is exactly zero through the block's output projection, its norm,
its MLP and the final norm. torch's backward kernels still work on every row (on a small vision
transformer that was a fifth of the saliency stage's time: the MLP's matrix products, GELU's
backward, the norms' backward). These operations' forwards are torch's own; their backward finds
the rows whose output gradient is not all zero and, when they are at most half of them, computes
the input gradient from those rows alone and leaves zeros elsewhere (token sequences only, N x tokens x
features: elsewhere every row carries gradient):

    linear:      dX_R = G_R W                       (x W^T + b, weight and bias frozen)
    gelu:        dX_R = gelu'(X_R) * G_R
    layer norm:  dX_R = layer norm backward of the rows R alone (each row is normalised by itself)

A row with zero output gradient gets zero input gradient in each formula (its inputs finite), so
only the order of floating-point sums can differ from torch's. With more rows live, torch's own
backward runs. Rows are every position of the leading dimensions; the last dimension is the
features. A weight or bias that requires grad, or a layer norm over more than the last dimension,
keeps torch's own operation (:func:`rows_call` says which calls are handled).
"""

from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F

__all__ = ["ROWS_OPS", "gelu_rows", "layer_norm_rows", "linear_rows", "rows_call"]

ROWS_OPS = {"linear": "heedmap::linear_rows", "gelu": "heedmap::gelu_rows", "layer_norm": "heedmap::layer_norm_rows"}  # for edited TorchScript graphs


def _live_rows(grad: torch.Tensor) -> torch.Tensor | None:
    """Indices of the rows of ``grad`` (flattened leading dimensions) that are not all zero, when at most half
    of them are; None when more are (torch's own backward is then as cheap), or when ``grad`` is no token
    sequence (N x tokens x features). A NaN row counts as live."""
    if grad.ndim != 3:
        return None
    flat = grad.reshape(-1, grad.shape[-1])
    live = flat.abs().amax(dim=1).ne(0)  # a tenth of ne(0).any(1)'s time on CPU; NaN stays NaN, which is not 0
    rows = live.nonzero().flatten()
    return None if 2 * len(rows) > flat.shape[0] else rows


def _scatter_rows(shape: torch.Size, rows: torch.Tensor, values: torch.Tensor, like: torch.Tensor) -> torch.Tensor:
    out = like.new_zeros((int(torch.Size(shape[:-1]).numel()), shape[-1]))
    out.index_copy_(0, rows, values)
    return out.reshape(shape)


def _linear_backward(x_shape: torch.Size, weight: torch.Tensor, grad: torch.Tensor) -> torch.Tensor:
    rows = _live_rows(grad)
    if rows is None:
        return grad.matmul(weight).reshape(x_shape)
    g = grad.reshape(-1, grad.shape[-1]).index_select(0, rows)
    return _scatter_rows(x_shape, rows, g.matmul(weight), grad)


def _gelu_backward(x: torch.Tensor, grad: torch.Tensor, approximate: str) -> torch.Tensor:
    rows = _live_rows(grad)
    if rows is None:
        found: torch.Tensor = torch.ops.aten.gelu_backward(grad, x, approximate=approximate)
        return found
    g = grad.reshape(-1, grad.shape[-1]).index_select(0, rows)
    xr = x.reshape(-1, x.shape[-1]).index_select(0, rows)
    return _scatter_rows(x.shape, rows, torch.ops.aten.gelu_backward(g, xr, approximate=approximate), grad)


def _layer_norm_backward(x: torch.Tensor, weight: torch.Tensor | None, bias: torch.Tensor | None, eps: float, grad: torch.Tensor,
                         shape: list[int] | None = None) -> torch.Tensor:
    if shape is not None and list(shape) != [x.shape[-1]]:  # over more than the last dimension: torch's own backward
        with torch.enable_grad():
            xd = x.detach().requires_grad_(True)
            (dx,) = torch.autograd.grad(F.layer_norm(xd, shape, weight, bias, eps), xd, grad)
        return dx
    shape = [x.shape[-1]]
    rows = _live_rows(grad)
    xr = x.reshape(-1, x.shape[-1]) if rows is None else x.reshape(-1, x.shape[-1]).index_select(0, rows)
    g = grad.reshape(-1, grad.shape[-1]) if rows is None else grad.reshape(-1, grad.shape[-1]).index_select(0, rows)
    _, mean, rstd = torch.native_layer_norm(xr, shape, weight, bias, eps)
    dx = torch.ops.aten.native_layer_norm_backward(g, xr, shape, mean, rstd, weight, bias, [True, False, False])[0]
    return dx.reshape(x.shape) if rows is None else _scatter_rows(x.shape, rows, dx, grad)


class _LinearRows(torch.autograd.Function):
    @staticmethod
    def forward(ctx: Any, x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor | None) -> torch.Tensor:
        ctx.save_for_backward(weight)
        ctx.x_shape = x.shape
        return F.linear(x, weight, bias)

    @staticmethod
    def backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None, None]:
        (weight,) = ctx.saved_tensors
        return _linear_backward(ctx.x_shape, weight, grad), None, None


class _GeluRows(torch.autograd.Function):
    @staticmethod
    def forward(ctx: Any, x: torch.Tensor, approximate: str) -> torch.Tensor:
        ctx.save_for_backward(x)
        ctx.approximate = approximate
        return F.gelu(x, approximate=approximate)

    @staticmethod
    def backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None]:
        (x,) = ctx.saved_tensors
        return _gelu_backward(x, grad, ctx.approximate), None


class _LayerNormRows(torch.autograd.Function):
    @staticmethod
    def forward(ctx: Any, x: torch.Tensor, weight: torch.Tensor | None, bias: torch.Tensor | None, eps: float) -> torch.Tensor:
        ctx.save_for_backward(x, weight, bias)
        ctx.eps = eps
        return F.layer_norm(x, [x.shape[-1]], weight, bias, eps)

    @staticmethod
    def backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None, None, None]:
        x, weight, bias = ctx.saved_tensors
        return _layer_norm_backward(x, weight, bias, ctx.eps, grad), None, None, None


def linear_rows(x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor | None = None) -> torch.Tensor:
    """``F.linear(x, weight, bias)`` with the row-sparse backward (weight and bias frozen)."""
    return _LinearRows.apply(x, weight, bias)  # type: ignore[no-untyped-call,no-any-return]


def gelu_rows(x: torch.Tensor, approximate: str = "none") -> torch.Tensor:
    """``F.gelu(x, approximate=approximate)`` with the row-sparse backward."""
    return _GeluRows.apply(x, approximate)  # type: ignore[no-untyped-call,no-any-return]


def layer_norm_rows(x: torch.Tensor, weight: torch.Tensor | None, bias: torch.Tensor | None, eps: float = 1e-5) -> torch.Tensor:
    """``F.layer_norm(x, [x.shape[-1]], weight, bias, eps)`` with the row-sparse backward (weight and bias frozen)."""
    return _LayerNormRows.apply(x, weight, bias, eps)  # type: ignore[no-untyped-call,no-any-return]


def _frozen(*ts: object) -> bool:
    return all(t is None or (isinstance(t, torch.Tensor) and not t.requires_grad) for t in ts)


def _takes_rows(x: object) -> bool:
    """A token sequence (N x tokens x features) that records gradients: elsewhere (a head on pooled features, a
    norm over a channels-last map) every row carries gradient, and finding that out would only cost time."""
    return isinstance(x, torch.Tensor) and x.requires_grad and x.ndim == 3 and x.is_floating_point() and torch.is_grad_enabled()


def rows_call(name: str, args: tuple[object, ...], kwargs: dict[str, object]) -> torch.Tensor | None:
    """The call ``name(*args, **kwargs)`` (``linear``, ``gelu`` or ``layer_norm``, as torch.nn.functional or
    aten spells it) run with the row-sparse backward, when it is one this module handles; None otherwise."""
    try:
        if name == "linear":
            given = dict(zip(("input", "weight", "bias"), args), **kwargs)
            x, w, b = given.get("input"), given.get("weight"), given.get("bias")
            if set(given) <= {"input", "weight", "bias"} and _takes_rows(x) and isinstance(w, torch.Tensor) and w.ndim == 2 and _frozen(w, b):
                return linear_rows(x, w, b)  # type: ignore[arg-type]
        elif name == "gelu":
            given = dict(zip(("input", "approximate"), args), **kwargs)
            x, approximate = given.get("input"), given.get("approximate", "none")
            if set(given) <= {"input", "approximate"} and _takes_rows(x) and approximate in ("none", "tanh"):
                return gelu_rows(x, str(approximate))  # type: ignore[arg-type]
        elif name == "layer_norm":
            given = dict(zip(("input", "normalized_shape", "weight", "bias", "eps", "cudnn_enable"), args), **kwargs)
            x, shape = given.get("input"), given.get("normalized_shape")
            w, b, eps = given.get("weight"), given.get("bias"), given.get("eps", 1e-5)
            if (set(given) <= {"input", "normalized_shape", "weight", "bias", "eps", "cudnn_enable"} and _takes_rows(x) and _frozen(w, b)
                    and isinstance(x, torch.Tensor) and list(shape) == [x.shape[-1]] and isinstance(eps, (int, float))):  # type: ignore[call-overload]
                return layer_norm_rows(x, w, b, float(eps))  # type: ignore[arg-type]
    except TypeError:  # an argument given twice or of an unexpected type: torch's own call says what is wrong
        return None
    return None


# The registered forms, which edited TorchScript graphs call (an autograd Function costs less per call
# from Python). Parameters there are frozen; a weight or bias that still requires grad gets its gradient.
@torch.library.custom_op(ROWS_OPS["linear"], mutates_args=())
def _linear_rows_op(x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor | None) -> torch.Tensor:
    return F.linear(x, weight, bias)


@_linear_rows_op.register_fake
def _(x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor | None) -> torch.Tensor:
    return x.new_empty((*x.shape[:-1], weight.shape[0]))


def _linear_setup(ctx: Any, inputs: tuple[Any, ...], output: torch.Tensor) -> None:
    x, weight, bias = inputs
    ctx.x_shape, ctx.has_bias = x.shape, bias is not None
    ctx.save_for_backward(x if weight.requires_grad else None, weight)


def _linear_op_backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor | None, torch.Tensor | None]:
    x, weight = ctx.saved_tensors
    dw = grad.reshape(-1, grad.shape[-1]).t().matmul(x.reshape(-1, x.shape[-1])) if x is not None and ctx.needs_input_grad[1] else None
    db = grad.reshape(-1, grad.shape[-1]).sum(0) if ctx.has_bias and ctx.needs_input_grad[2] else None
    return (_linear_backward(ctx.x_shape, weight, grad) if ctx.needs_input_grad[0] else None), dw, db  # type: ignore[return-value]


_linear_rows_op.register_autograd(_linear_op_backward, setup_context=_linear_setup)


@torch.library.custom_op(ROWS_OPS["gelu"], mutates_args=())
def _gelu_rows_op(x: torch.Tensor, approximate: str) -> torch.Tensor:
    return F.gelu(x, approximate=approximate)


@_gelu_rows_op.register_fake
def _(x: torch.Tensor, approximate: str) -> torch.Tensor:
    return torch.empty_like(x)


def _gelu_setup(ctx: Any, inputs: tuple[Any, ...], output: torch.Tensor) -> None:
    ctx.save_for_backward(inputs[0])
    ctx.approximate = inputs[1]


def _gelu_op_backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None]:
    (x,) = ctx.saved_tensors
    return _gelu_backward(x, grad, ctx.approximate), None


_gelu_rows_op.register_autograd(_gelu_op_backward, setup_context=_gelu_setup)


@torch.library.custom_op(ROWS_OPS["layer_norm"], mutates_args=())
def _layer_norm_rows_op(x: torch.Tensor, normalized_shape: list[int], weight: torch.Tensor | None, bias: torch.Tensor | None, eps: float) -> torch.Tensor:
    return F.layer_norm(x, normalized_shape, weight, bias, eps)


@_layer_norm_rows_op.register_fake
def _(x: torch.Tensor, normalized_shape: list[int], weight: torch.Tensor | None, bias: torch.Tensor | None, eps: float) -> torch.Tensor:
    return torch.empty_like(x)


def _layer_norm_setup(ctx: Any, inputs: tuple[Any, ...], output: torch.Tensor) -> None:
    x, shape, weight, bias, eps = inputs
    if (weight is not None and weight.requires_grad) or (bias is not None and bias.requires_grad):
        raise RuntimeError("heedmap::layer_norm_rows is for frozen parameters only; freeze the model's parameters first.")
    ctx.save_for_backward(x, weight, bias)
    ctx.shape, ctx.eps = list(shape), float(eps)


def _layer_norm_op_backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, None, None, None, None]:
    x, weight, bias = ctx.saved_tensors
    return _layer_norm_backward(x, weight, bias, ctx.eps, grad, ctx.shape), None, None, None, None


_layer_norm_rows_op.register_autograd(_layer_norm_op_backward, setup_context=_layer_norm_setup)
