"""Verification: one forward pass, and the search for the factored layers that break it."""

from __future__ import annotations

import pytest
import torch
from torch import nn

import factorize
from factorize import FactorizeError
from factorize.rewrite.verify import check_runs, find_breaking_layers, keep_working


class Picky(nn.Module):
    """A parent that insists its child's weight is a stored Parameter (as some hand-written code does)."""

    def __init__(self, n: int) -> None:
        super().__init__()
        self.fc = nn.Linear(n, n)

    def forward(self, x):
        if not isinstance(self.fc.weight, nn.Parameter):
            raise TypeError("fc.weight must be a Parameter")
        return torch.relu(self.fc(x))


def _model():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(32, 32), Picky(32), nn.Linear(32, 32), Picky(32), nn.Linear(32, 8))


def test_check_runs_returns_the_error_instead_of_raising():
    model = _model()
    assert check_runs(model, torch.randn(4, 32)) is None
    err = check_runs(model, torch.randn(4, 7))
    assert isinstance(err, RuntimeError)


def test_finds_exactly_the_breaking_layers_and_keeps_them_dense():
    model = _model()
    result = factorize.compress(model, rank=4)
    batch = torch.randn(4, 32)
    assert isinstance(check_runs(result.model, batch), TypeError)
    broken = find_breaking_layers(model, result.model, result.plan, batch)
    assert [b.name for b in broken] == ["1.fc", "3.fc"]
    assert all("TypeError" in b.reason for b in broken)
    fixed = keep_working(model, result.model, result.plan, batch)
    assert check_runs(fixed.model, batch) is None
    assert not factorize.is_factored(fixed.model[1].fc) and factorize.is_factored(fixed.model[0])
    assert torch.equal(fixed.model[1].fc.weight, model[1].fc.weight)  # restored from the original, not merged
    assert fixed.plan["sites"]["1.fc"]["action"] == "dense" and "failed to run" in fixed.plan["sites"]["1.fc"]["reason"]
    assert result.plan["sites"]["1.fc"]["action"] == "factor"  # the input plan is not modified
    assert factorize.is_factored(result.model[1].fc)  # nor the input model


def test_nothing_to_find_when_it_runs_and_raise_mode_lists_layers():
    model = nn.Sequential(nn.Linear(16, 16), nn.ReLU(), nn.Linear(16, 4))
    result = factorize.compress(model, rank=2)
    assert find_breaking_layers(model, result.model, result.plan, torch.randn(2, 16)) == []
    bad = _model()
    res = factorize.compress(bad, rank=4)
    with pytest.raises(FactorizeError, match="fails its forward pass") as info:
        keep_working(bad, res.model, res.plan, torch.randn(2, 32), on_break="raise")
    assert "1.fc" in str(info.value)


def test_a_batch_the_original_rejects_is_reported_as_such():
    model = _model()
    result = factorize.compress(model, rank=4)
    with pytest.raises(FactorizeError, match="original model fails"):
        find_breaking_layers(model, result.model, result.plan, torch.randn(2, 5))
