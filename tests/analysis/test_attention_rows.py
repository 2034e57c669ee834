"""The row-sparse attention backward against torch's own attention autograd and against finite
differences (torch.autograd.gradcheck), for one live query row (a class-token head), a few, and all
of them (where torch's own backward kernel is used)."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from analysis.attention_rows import attention_rows, plain_attention_call


def _qkv(shape: tuple[int, ...], seed: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    gen = torch.Generator().manual_seed(seed)
    q, k, v = (torch.randn(*shape, generator=gen, dtype=torch.float64).requires_grad_(True) for _ in range(3))
    return q, k, v


@pytest.mark.parametrize("shape", [(2, 3, 9, 4), (3, 9, 4)])
@pytest.mark.parametrize("live", [[0], [0, 5], list(range(9))])
@pytest.mark.parametrize("scale", [None, 0.3])
def test_attention_rows_gradients_equal_torch_attention(shape: tuple[int, ...], live: list[int], scale: float | None) -> None:
    q, k, v = _qkv(shape, seed=len(live) + len(shape))
    grad = torch.zeros(shape, dtype=torch.float64)
    grad[..., live, :] = torch.randn(grad[..., live, :].shape, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
    out = attention_rows(q, k, v, scale=scale)
    torch.testing.assert_close(out, F.scaled_dot_product_attention(q, k, v, scale=scale))
    ours = torch.autograd.grad(out, (q, k, v), grad)
    ref = torch.autograd.grad(F.scaled_dot_product_attention(q, k, v, scale=scale), (q, k, v), grad)
    assert all(float(r.abs().max()) > 0 for r in ref)  # every gradient non-zero, so the comparison can fail
    for a, b in zip(ours, ref):
        torch.testing.assert_close(a, b, rtol=1e-10, atol=1e-12)


def test_attention_rows_passes_gradcheck() -> None:
    # gradcheck seeds one output element at a time: exactly the one-live-row case, against finite differences.
    q, k, v = _qkv((1, 2, 5, 3), seed=1)
    assert torch.autograd.gradcheck(lambda a, b, c: attention_rows(a, b, c, scale=0.7), (q, k, v))


def test_attention_rows_float32_flash_forward_and_dense_backward_match_torch() -> None:
    gen = torch.Generator().manual_seed(8)
    q, k, v = (torch.randn(4, 2, 33, 16, generator=gen).requires_grad_(True) for _ in range(3))
    grad = torch.randn(4, 2, 33, 16, generator=gen)
    ours = torch.autograd.grad(attention_rows(q, k, v), (q, k, v), grad)
    ref = torch.autograd.grad(F.scaled_dot_product_attention(q, k, v), (q, k, v), grad)
    for a, b in zip(ours, ref):
        torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-6)


def test_attention_rows_counts_a_nan_row_as_live() -> None:
    q, k, v = _qkv((1, 1, 4, 2), seed=3)
    grad = torch.zeros(1, 1, 4, 2, dtype=torch.float64)
    grad[0, 0, 2, 0] = float("nan")
    dq, dk, dv = torch.autograd.grad(attention_rows(q, k, v), (q, k, v), grad)
    assert bool(dq[0, 0, 2].isnan().all()) and bool(dk.isnan().any()) and bool(dv.isnan().any())


def test_attention_rows_with_broadcast_leading_dimensions_uses_torch_backward() -> None:
    gen = torch.Generator().manual_seed(5)
    q = torch.randn(2, 3, 6, 4, generator=gen, dtype=torch.float64, requires_grad=True)
    k = torch.randn(1, 3, 6, 4, generator=gen, dtype=torch.float64, requires_grad=True)
    v = torch.randn(1, 3, 6, 4, generator=gen, dtype=torch.float64, requires_grad=True)
    grad = torch.zeros(2, 3, 6, 4, dtype=torch.float64)
    grad[:, :, 0] = 1.0
    ours = torch.autograd.grad(attention_rows(q, k, v), (q, k, v), grad)
    ref = torch.autograd.grad(F.scaled_dot_product_attention(q, k, v), (q, k, v), grad)
    for a, b in zip(ours, ref):
        assert a.shape == b.shape
        torch.testing.assert_close(a, b)


def test_plain_attention_call_refuses_masks_dropout_causal_and_grouped_heads() -> None:
    q = torch.randn(1, 2, 3, 4)
    assert plain_attention_call((q, q, q), {}) is not None
    assert plain_attention_call((q, q, q), {"scale": 0.5}) == (q, q, q, 0.5)
    assert plain_attention_call((q, q, q, None, 0.0, False), {}) is not None
    assert plain_attention_call((q, q, q, torch.ones(3, 3, dtype=torch.bool)), {}) is None
    assert plain_attention_call((q, q, q), {"dropout_p": 0.1}) is None
    assert plain_attention_call((q, q, q), {"is_causal": True}) is None
    assert plain_attention_call((q, q, q), {"enable_gqa": True}) is None
    assert plain_attention_call((q, q, q.double()), {}) is None
    assert plain_attention_call((q, q[:, :1], q[:, :1]), {}) is None
