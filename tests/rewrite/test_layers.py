"""Factored modules: full-rank reproduction, training, compile/export, merge back."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from factorize import decompose
from factorize.rewrite.layers import factor_module, is_factored, to_dense
from factorize.model.sites import matrix_of


def _full_rank(module: nn.Module, kind: str):
    W = matrix_of(module, kind).detach()
    spec = decompose(W, precision="float64")
    B, A = spec.factors(spec.computed_rank)
    return factor_module(module, kind, B, A)


def _transposed():
    pytest.importorskip("transformers")
    from transformers.pytorch_utils import Conv1D

    torch.manual_seed(0)
    return Conv1D(12, 9)


CASES = [
    ("linear", lambda: nn.Linear(9, 12), lambda: torch.randn(4, 9)),
    ("linear", lambda: nn.Linear(12, 5, bias=False), lambda: torch.randn(2, 3, 12)),
    ("conv2d", lambda: nn.Conv2d(3, 8, 3, stride=2, padding=1, dilation=1), lambda: torch.randn(2, 3, 9, 9)),
    ("conv2d", lambda: nn.Conv2d(4, 6, (3, 2), padding=2, dilation=2, bias=False), lambda: torch.randn(1, 4, 7, 8)),
    ("conv2d", lambda: nn.Conv2d(3, 5, 3, padding=1, padding_mode="reflect"), lambda: torch.randn(2, 3, 6, 6)),
    ("conv1d", lambda: nn.Conv1d(5, 7, 4, stride=2, padding=1), lambda: torch.randn(3, 5, 20)),
    ("embedding", lambda: nn.Embedding(30, 6, padding_idx=0), lambda: torch.randint(0, 30, (4, 5))),
    ("transposed", _transposed, lambda: torch.randn(3, 9)),
]


@pytest.mark.parametrize("kind,make,inputs", CASES)
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_full_rank_reproduces_outputs(kind, make, inputs, dtype):
    torch.manual_seed(0)
    layer = make().to(dtype)
    x = inputs()
    x = x.to(dtype) if x.is_floating_point() else x
    fac = _full_rank(layer, kind)
    assert is_factored(fac) and fac.rank == min(matrix_of(layer, kind).shape)
    tol = 1e-4 if dtype == torch.float32 else 1e-10
    with torch.no_grad():
        torch.testing.assert_close(fac(x), layer(x), rtol=tol, atol=tol)
        torch.testing.assert_close(to_dense(fac)(x), layer(x), rtol=tol, atol=tol)


def test_truncated_linear_error_matches_eckart_young():
    # Eckart & Young 1936 / Mirsky 1960: weight error of the factored layer = sqrt(sum of discarded s_i^2).
    torch.manual_seed(1)
    lin = nn.Linear(20, 30).double()
    spec = decompose(lin.weight.detach())
    fac = factor_module(lin, "linear", *spec.factors(6))
    err = torch.linalg.matrix_norm(lin.weight - fac.product()).item()
    s = torch.linalg.svdvals(lin.weight.detach())
    assert err == pytest.approx(float((s[6:] ** 2).sum().sqrt()), rel=1e-9)
    assert torch.equal(fac.second.bias, lin.bias)


def test_factored_layer_trains_with_autograd():
    torch.manual_seed(2)
    lin = nn.Linear(16, 16)
    fac = factor_module(lin, "linear", *decompose(lin.weight.detach()).factors(4))
    opt = torch.optim.SGD(fac.parameters(), lr=0.1)
    x, y = torch.randn(64, 16), torch.randn(64, 16)
    losses = []
    for _ in range(5):
        opt.zero_grad()
        loss = ((fac(x) - y) ** 2).mean()
        loss.backward()
        opt.step()
        losses.append(loss.item())
    assert losses[-1] < losses[0]
    assert fac.first.weight.grad is not None and fac.second.weight.grad is not None


def test_torch_export_and_compile():
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    model[0] = factor_module(model[0], "linear", *decompose(model[0].weight.detach()).factors(3))
    x = torch.randn(5, 8)
    exported = torch.export.export(model, (x,))
    torch.testing.assert_close(exported.module()(x), model(x))
    compiled = torch.compile(model, backend="eager")  # graph capture without a C++ toolchain dependency
    torch.testing.assert_close(compiled(x), model(x))


def test_merge_keeps_training_mode_and_dtype():
    lin = nn.Linear(6, 6).to(torch.float64).train()
    fac = _full_rank(lin, "linear")
    dense = to_dense(fac)
    assert isinstance(dense, nn.Linear) and dense.training and dense.weight.dtype == torch.float64
