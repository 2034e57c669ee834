"""Scaled dot-product attention whose backward pass works only on the query rows that carry gradient.

Grad-CAM at a transformer block differentiates the predicted logit, and a class-token head reads
one token: after the last attention, every other token's output gets exactly zero gradient. torch's
own attention backward still works on all L x L query-key pairs (about twice the forward's cost),
which on a small vision transformer is most of the saliency stage's extra work. This operator's
forward is torch's attention kernel; its backward finds the query rows whose output gradient is not
all zero and, when they are at most half of them, computes the gradients from those rows alone:

    P_R  = softmax(s Q_R K^T)                      (the rows' attention, recomputed)
    dV   = P_R^T G_R
    dS_R = P_R * (G_R V^T - rowsum(G_R * O_R))
    dQ_R = s dS_R K,  dQ elsewhere 0
    dK   = s dS_R^T Q_R

(the softmax backward of the attention formula; a row with zero output gradient contributes zero
to every term, so leaving it out changes only the order of floating-point sums). With more rows
live, it uses torch's own backward kernel on the CPU (or the same formula over every row elsewhere).

Only the plain case is handled (no mask, no dropout, not causal, no grouped heads, q, k, v with the
same leading dimensions); :func:`plain_attention_call` says whether a call is one.
"""

from __future__ import annotations

from typing import Any

import torch
import torch.nn.functional as F

__all__ = ["ATTENTION_ROWS_OP", "attention_rows", "plain_attention_call"]

ATTENTION_ROWS_OP = "heedmap::attention_rows"  # also called from edited TorchScript graphs


def _forward(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, scale: float | None) -> tuple[torch.Tensor, torch.Tensor]:
    """(output, logsumexp of each query row: empty where torch's CPU kernel does not apply)."""
    if q.device.type == "cpu" and q.ndim == 4 and q.shape[-1] == v.shape[-1]:
        out, lse = torch.ops.aten._scaled_dot_product_flash_attention_for_cpu(q, k, v, 0.0, False, attn_mask=None, scale=scale)[:2]
        return out, lse
    return F.scaled_dot_product_attention(q, k, v, scale=scale), q.new_empty(0)


def _backward(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, out: torch.Tensor, lse: torch.Tensor, grad: torch.Tensor, given: float | None) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """(dq, dk, dv) from the live query rows (see the module docstring)."""
    scale = given if given is not None else q.shape[-1] ** -0.5
    if q.shape[:-2] != k.shape[:-2] or k.shape[:-2] != v.shape[:-2]:  # broadcast leading dimensions: torch's own backward
        with torch.enable_grad():
            lq, lk, lv = (t.detach().requires_grad_(True) for t in (q, k, v))
            dq, dk, dv = torch.autograd.grad(F.scaled_dot_product_attention(lq, lk, lv, scale=given), (lq, lk, lv), grad)
        return dq, dk, dv
    length = q.shape[-2]
    live = grad.abs().reshape(-1, length, grad.shape[-1]).amax(dim=(0, 2)).ne(0)  # a NaN row counts as live
    rows = live.nonzero().flatten()
    if 2 * len(rows) > length:
        if lse.numel():
            dq, dk, dv = torch.ops.aten._scaled_dot_product_flash_attention_for_cpu_backward(
                grad.contiguous(), q, k, v, out, lse, 0.0, False, attn_mask=None, scale=given
            )
            return dq, dk, dv
        rows = torch.arange(length, device=q.device)
    q_r, g_r, o_r = q.index_select(-2, rows), grad.index_select(-2, rows), out.index_select(-2, rows)
    p = torch.softmax(torch.matmul(q_r, k.transpose(-1, -2)) * scale, dim=-1)  # ... x r x Lk
    dv = torch.matmul(p.transpose(-1, -2), g_r)
    ds = p * (torch.matmul(g_r, v.transpose(-1, -2)) - (g_r * o_r).sum(dim=-1, keepdim=True))
    dk = torch.matmul(ds.transpose(-1, -2), q_r) * scale
    dq = torch.zeros_like(q).index_copy_(-2, rows, torch.matmul(ds, k) * scale)
    return dq, dk, dv


class _AttentionRows(torch.autograd.Function):
    """The eager form (an autograd Function costs far less per call than a registered operator)."""

    @staticmethod
    def forward(ctx: Any, q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, scale: float | None) -> torch.Tensor:
        out, lse = _forward(q, k, v, scale)
        ctx.save_for_backward(q, k, v, out, lse)
        ctx.scale = scale
        return out

    @staticmethod
    def backward(ctx: Any, grad: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, None]:
        q, k, v, out, lse = ctx.saved_tensors
        return (*_backward(q, k, v, out, lse, grad, ctx.scale), None)


@torch.library.custom_op(ATTENTION_ROWS_OP, mutates_args=())
def _attention_rows_op(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, scale: float | None, dropout_p: float) -> tuple[torch.Tensor, torch.Tensor]:
    """The registered form, which TorchScript graphs can call: (output, logsumexp). ``dropout_p``
    must be 0; it is an argument because a TorchScript graph computes it at run time (0 in eval mode)."""
    if dropout_p != 0.0:
        raise RuntimeError(f"attention dropout is {dropout_p} during Grad-CAM: the model must be in eval mode.")
    return _forward(q, k, v, scale)


@_attention_rows_op.register_fake
def _(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, scale: float | None, dropout_p: float) -> tuple[torch.Tensor, torch.Tensor]:
    return q.new_empty((*q.shape[:-1], v.shape[-1])), q.new_empty(0)


def _op_setup(ctx: Any, inputs: tuple[object, ...], output: tuple[torch.Tensor, torch.Tensor]) -> None:
    q, k, v, scale, _dropout = inputs
    ctx.save_for_backward(q, k, v, *output)
    ctx.scale = scale


def _op_backward(ctx: Any, grad: torch.Tensor, _grad_lse: torch.Tensor | None) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, None, None]:
    q, k, v, out, lse = ctx.saved_tensors
    return (*_backward(q, k, v, out, lse, grad, ctx.scale), None, None)


_attention_rows_op.register_autograd(_op_backward, setup_context=_op_setup)


def attention_rows(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, *, scale: float | None = None) -> torch.Tensor:
    """softmax(scale q k^T) v, as ``F.scaled_dot_product_attention(q, k, v, scale=scale)``, with the
    row-sparse backward described in the module docstring. q, k, v: ... x L x E with equal leading dimensions."""
    return _AttentionRows.apply(q, k, v, scale)  # type: ignore[no-untyped-call,no-any-return]


def plain_attention_call(args: tuple[object, ...], kwargs: dict[str, object]) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, float | None] | None:
    """(q, k, v, scale) when a ``scaled_dot_product_attention(*args, **kwargs)`` call is the plain case
    :func:`attention_rows` computes (no mask, no dropout, not causal, no grouped heads); None otherwise."""
    names = ("query", "key", "value", "attn_mask", "dropout_p", "is_causal", "scale", "enable_gqa")
    if len(args) > len(names):
        return None
    given = dict(zip(names, args))
    for key, value in kwargs.items():
        if key not in names or key in given:
            return None
        given[key] = value
    q, k, v = given.get("query"), given.get("key"), given.get("value")
    if not isinstance(q, torch.Tensor) or not isinstance(k, torch.Tensor) or not isinstance(v, torch.Tensor):
        return None
    if given.get("attn_mask") is not None or given.get("dropout_p", 0.0) not in (0, 0.0) or given.get("is_causal", False) or given.get("enable_gqa", False):
        return None
    scale = given.get("scale")
    if scale is not None and not isinstance(scale, (int, float)):
        return None
    if q.ndim < 2 or q.ndim != k.ndim or k.ndim != v.ndim or q.shape[:-2] != k.shape[:-2] or k.shape[:-2] != v.shape[:-2] or k.shape[-2] != v.shape[-2]:
        return None
    if not (q.dtype == k.dtype == v.dtype) or not q.is_floating_point() or not (q.device == k.device == v.device):
        return None
    return q, k, v, None if scale is None else float(scale)
