"""Linear, GELU and layer norm with the row-sparse backward: the same input gradient as torch's own
operations (to rounding), exact zeros on the rows that carry none, torch's own where they do not apply."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from analysis.token_rows import gelu_rows, layer_norm_rows, linear_rows, rows_call

torch.manual_seed(0)
W, B = torch.randn(12, 8, dtype=torch.float64), torch.randn(12, dtype=torch.float64)
LN_W, LN_B = torch.randn(8, dtype=torch.float64), torch.randn(8, dtype=torch.float64)
OPS_WIDTH = {"linear": 12}  # output features where they differ from the input's 8

OPS = {
    "linear": (lambda x: linear_rows(x, W, B), lambda x: F.linear(x, W, B)),
    "gelu": (lambda x: gelu_rows(x), lambda x: F.gelu(x)),
    "gelu tanh": (lambda x: gelu_rows(x, "tanh"), lambda x: F.gelu(x, approximate="tanh")),
    "layer norm": (lambda x: layer_norm_rows(x, LN_W, LN_B, 1e-5), lambda x: F.layer_norm(x, [8], LN_W, LN_B, 1e-5)),
    "layer norm, no affine": (lambda x: layer_norm_rows(x, None, None, 1e-6), lambda x: F.layer_norm(x, [8], None, None, 1e-6)),
}


def _grads(name: str, x: torch.Tensor, live: list[int]) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    ours, torchs = OPS[name]
    a, b = x.clone().requires_grad_(True), x.clone().requires_grad_(True)
    ya, yb = ours(a), torchs(b)
    assert torch.equal(ya, yb)  # the forward is torch's own
    g = torch.zeros_like(ya)
    flat = g.view(-1, g.shape[-1])
    flat[live] = torch.randn(len(live), g.shape[-1], dtype=g.dtype)
    (ga,) = torch.autograd.grad(ya, a, g)
    (gb,) = torch.autograd.grad(yb, b, g)
    return ga, gb, g


@pytest.mark.parametrize("name", OPS)
@pytest.mark.parametrize("live", [[0], [0, 7, 14], list(range(0, 21, 2)), list(range(21))], ids=["one row", "three", "half", "all"])
def test_input_gradient_is_torchs_and_zero_on_rows_without_gradient(name: str, live: list[int]) -> None:
    x = torch.randn(3, 7, 8, dtype=torch.float64)  # 21 rows (tokens) of 8 features
    ga, gb, _ = _grads(name, x, live)
    torch.testing.assert_close(ga, gb, rtol=1e-12, atol=1e-12)
    dead = [r for r in range(21) if r not in live]
    assert torch.count_nonzero(ga.reshape(21, -1)[dead]) == 0


@pytest.mark.parametrize("name", OPS)
def test_a_nan_in_the_gradient_counts_as_a_live_row(name: str) -> None:
    x = torch.randn(2, 5, 8, dtype=torch.float64)
    a, b = x.clone().requires_grad_(True), x.clone().requires_grad_(True)
    ours, torchs = OPS[name]
    g = torch.zeros(2, 5, OPS_WIDTH.get(name, 8), dtype=torch.float64)
    g[0, 3, 1] = float("nan")
    (ga,) = torch.autograd.grad(ours(a), a, g)
    (gb,) = torch.autograd.grad(torchs(b), b, g)
    assert torch.equal(ga.isnan(), gb.isnan()) and bool(ga.isnan().any())


def test_calls_it_does_not_handle_keep_torchs_own() -> None:
    x = torch.randn(2, 3, 8, requires_grad=True)
    w = torch.randn(12, 8)
    assert rows_call("linear", (x, w), {}) is not None
    assert rows_call("linear", (x, w.clone().requires_grad_(True)), {}) is None  # a trained weight: its gradient is wanted
    assert rows_call("linear", (x.detach(), w), {}) is None  # nothing to differentiate
    assert rows_call("linear", (x, w), {"other": 1}) is None
    assert rows_call("layer_norm", (x, [3, 8]), {}) is None  # over more than the last dimension
    assert rows_call("layer_norm", (x, [8]), {"eps": 1e-6}) is not None
    assert rows_call("layer_norm", (x, 8), {}) is None  # an int shape: torch's own (which accepts it)
    assert rows_call("gelu", (x,), {"approximate": "erf"}) is None
    assert rows_call("softmax", (x, -1), {}) is None
    assert rows_call("linear", (x, torch.randn(8)), {}) is None  # a 1-d weight: torch's own
    assert rows_call("linear", (torch.randn(2, 8, requires_grad=True), w), {}) is None  # pooled features: every row is live
    assert rows_call("layer_norm", (torch.randn(2, 4, 4, 8, requires_grad=True), [8]), {}) is None  # a channels-last map
    with torch.no_grad():
        assert rows_call("gelu", (x,), {}) is None
