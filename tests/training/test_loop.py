"""Tests for factorize/training.py: compressing inside a training loop, re-truncation, the progressive schedule."""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

import factorize
from factorize.errors import FactorizeError
from factorize.rewrite.layers import factor_module, factored_layers
from factorize.training.loop import (
    ProgressiveSchedule,
    compress_in_training,
    factored_spectrum,
    merge_in_training,
    refactor,
)
from tests.conftest import CNN, MLP


def _digits(n: int = 600):
    # Source: scikit-learn's bundled digits data (Alpaydin & Kaynak, "Optical Recognition of Handwritten
    # Digits", UCI, 1998); pixels 0..16 scaled to [0, 1].
    datasets = pytest.importorskip("sklearn.datasets")
    x, y = datasets.load_digits(return_X_y=True)
    return torch.tensor(x[:n] / 16.0, dtype=torch.float32), torch.tensor(y[:n], dtype=torch.int64)


def _train(model, optimizer, x, y, steps: int) -> list[float]:
    losses = []
    for _ in range(steps):
        optimizer.zero_grad()
        loss = F.cross_entropy(model(x), y)
        loss.backward()
        optimizer.step()
        losses.append(loss.item())
    return losses


# --- compressing mid-training ------------------------------------------------------------------------------


@pytest.mark.parametrize("opt_cls, kwargs", [
    (torch.optim.Adam, {"lr": 3e-3, "weight_decay": 1e-4}),
    (torch.optim.SGD, {"lr": 0.05, "momentum": 0.9}),
])
def test_model_compressed_mid_training_keeps_training(opt_cls, kwargs) -> None:
    # Real data (scikit-learn digits): train a little, compress to 30% of the linear parameters, keep training
    # with the rebuilt optimizer: the loss keeps falling.
    x, y = _digits(400)
    torch.manual_seed(0)
    model = MLP(d_in=64, hidden=64, d_out=10)
    optimizer = opt_cls(model.parameters(), **kwargs)
    _train(model, optimizer, x, y, 30)
    result, optimizer = compress_in_training(model, optimizer, budget=0.3)
    assert factored_layers(model) and result.plan["sites"]["fc1"]["action"] == "factor"
    assert type(optimizer) is opt_cls
    with torch.no_grad():
        at_compression = F.cross_entropy(model(x), y).item()
    after = _train(model, optimizer, x, y, 20)
    assert after[-1] < at_compression
    assert after[-1] < after[0]


def test_rebuilt_optimizer_copies_group_options_and_keeps_state() -> None:
    torch.manual_seed(0)
    model = MLP()
    groups = [{"params": list(model.fc1.parameters()), "lr": 1e-2, "weight_decay": 0.1},
              {"params": list(model.fc2.parameters()) + list(model.head.parameters())}]
    optimizer = torch.optim.AdamW(groups, lr=1e-3, betas=(0.8, 0.95))
    x, y = torch.randn(32, 24), torch.randint(0, 10, (32,))
    _train(model, optimizer, x, y, 3)
    head_state = optimizer.state[model.head.weight]
    fc1_bias_state = optimizer.state[model.fc1.bias]
    _, new = compress_in_training(model, optimizer, rank=4, exclude="head")
    assert type(new) is torch.optim.AdamW and new is not optimizer
    for old_g, new_g in zip(optimizer.param_groups, new.param_groups):
        assert {k: v for k, v in old_g.items() if k != "params"} == {k: v for k, v in new_g.items() if k != "params"}
    assert new.param_groups[0]["lr"] == 1e-2 and new.param_groups[1]["betas"] == (0.8, 0.95)
    # exactly the model's parameters, each once, in the group of the layer it replaced
    in_opt = [p for g in new.param_groups for p in g["params"]]
    assert {id(p) for p in in_opt} == {id(p) for p in model.parameters()} and len(in_opt) == len(set(map(id, in_opt)))
    assert {id(p) for p in new.param_groups[0]["params"]} == {id(p) for p in model.fc1.parameters()}
    assert new.state[model.head.weight] is head_state  # kept layer: same state
    assert new.state[model.fc1.second.bias] is fc1_bias_state  # rewritten layer's bias: state carried over
    assert model.fc1.first.weight not in new.state  # new factors: fresh
    _train(model, new, x, y, 2)  # and it steps


def test_frozen_layers_stay_frozen_and_out_of_the_optimizer() -> None:
    torch.manual_seed(0)
    model = MLP()
    for p in model.fc1.parameters():
        p.requires_grad_(False)
    optimizer = torch.optim.SGD([p for p in model.parameters() if p.requires_grad], lr=0.1)
    _, new = compress_in_training(model, optimizer, rank=4)
    assert not any(p.requires_grad for p in model.fc1.parameters())
    assert not {id(p) for p in model.fc1.parameters()} & {id(p) for g in new.param_groups for p in g["params"]}


# --- re-truncating factored layers -------------------------------------------------------------------------


@pytest.mark.parametrize("m, n, r", [(40, 30, 12), (20, 64, 9), (16, 16, 16)])
def test_factored_spectrum_matches_numpy_svd_of_the_product(m: int, n: int, r: int) -> None:
    # Reference: numpy.linalg.svd of the dense product B @ A.
    gen = torch.Generator().manual_seed(0)
    B, A = torch.randn(m, r, generator=gen), torch.randn(r, n, generator=gen)
    layer = factor_module(nn.Linear(n, m), "linear", B, A)
    spec = factored_spectrum(layer, precision="float64")
    product = (B.double() @ A.double()).numpy()
    expected = np.linalg.svd(product, compute_uv=False)
    k = spec.computed_rank
    assert k == r
    np.testing.assert_allclose(spec.S.numpy(), expected[:k], rtol=1e-6)
    assert np.all(expected[k:] < 1e-6 * expected[0])  # the product has no further nonzero singular value
    np.testing.assert_allclose(((spec.U * spec.S) @ spec.Vh).numpy(), product, atol=1e-5)
    assert spec.relative_error(k) < 1e-6  # nothing left out at full rank (float64 rounding only)


def test_refactor_lowers_ranks_to_the_best_approximation_of_each_product() -> None:
    # Eckart-Young-Mirsky: the rank-k truncation of B @ A is its best rank-k approximation; the re-truncated
    # layer must equal numpy's rank-k truncated SVD of the product.
    torch.manual_seed(0)
    model = factorize.compress(MLP(), rank=8).model
    products = {n: layer.product().detach().double().numpy() for n, layer in factored_layers(model).items()}
    result = refactor(model, rank=3)
    for name, layer in factored_layers(model).items():
        assert layer.rank == 3
        U, S, Vh = np.linalg.svd(products[name])
        best = (U[:, :3] * S[:3]) @ Vh[:3]
        np.testing.assert_allclose(layer.product().detach().double().numpy(), best, atol=1e-4)
    assert result.params_after < result.params_before


def test_refactor_never_grows_a_factored_layer_and_handles_conv() -> None:
    torch.manual_seed(0)
    model = factorize.compress(CNN(), rank=2, include="c*").model
    ranks = {n: layer.rank for n, layer in factored_layers(model).items()}
    assert ranks == {"c1": 2, "c2": 2, "c3": 2}  # every conv factored, so the checks below cover them all
    x = torch.randn(2, 3, 10, 10)
    with torch.no_grad():
        y = model(x)
    result = refactor(model, rank=6, include="c*")  # higher than now: everything stays as it is
    assert {n: layer.rank for n, layer in factored_layers(model).items()} == ranks
    assert all("never grown" in result.plan["sites"][n]["reason"] for n in ranks)
    with torch.no_grad():
        assert torch.allclose(model(x), y)


# --- merge -------------------------------------------------------------------------------------------------


def test_merge_in_training_gives_dense_layers_and_a_working_optimizer() -> None:
    torch.manual_seed(0)
    model = MLP()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
    x, y = torch.randn(32, 24), torch.randint(0, 10, (32,))
    _, optimizer = compress_in_training(model, optimizer, rank=4)
    _train(model, optimizer, x, y, 2)
    with torch.no_grad():
        before = model(x)
    bias_state = optimizer.state[model.fc1.second.bias]
    optimizer = merge_in_training(model, optimizer)
    assert not factored_layers(model)
    with torch.no_grad():
        assert torch.allclose(model(x), before, atol=1e-5)
    assert optimizer.state[model.fc1.bias] is bias_state
    assert {id(p) for g in optimizer.param_groups for p in g["params"]} == {id(p) for p in model.parameters()}
    _train(model, optimizer, x, y, 2)


# --- progressive schedule ----------------------------------------------------------------------------------


def test_progressive_schedule_lowers_the_budget_and_saves_a_loadable_file(tmp_path) -> None:
    from factorize.checkpoints import files as io

    x, y = _digits(400)
    torch.manual_seed(0)
    model = MLP(d_in=64, hidden=96, d_out=10)
    optimizer = torch.optim.Adam(model.parameters(), lr=3e-3)
    schedule = ProgressiveSchedule(budgets=[0.8, 0.5, 0.3], epochs=[1, 2, 3])
    for epoch in range(5):
        optimizer = schedule.step(epoch, model, optimizer)
        _train(model, optimizer, x, y, 10)
    assert schedule.done and [h["epoch"] for h in schedule.history] == [1, 2, 3]
    for h in schedule.history:
        assert h["site_params_kept"] <= h["budget"] + 1e-9
    for a, b in zip(schedule.history, schedule.history[1:]):  # ranks only ever go down
        assert set(b["ranks"]) == set(a["ranks"]) == {"fc1", "fc2"}  # compared layer by layer, none dropped
        assert all(b["ranks"][n] <= r for n, r in a["ranks"].items())
    path = io.save(model, tmp_path / "progressive.safetensors", plan=schedule.plan)
    fresh = io.load(MLP(d_in=64, hidden=96, d_out=10), path)
    with torch.no_grad():
        assert torch.equal(fresh(x), model(x))


def test_schedule_skipping_epochs_applies_the_lowest_due_budget() -> None:
    torch.manual_seed(0)
    model = MLP()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    schedule = ProgressiveSchedule(budgets=[0.8, 0.4], epochs=[1, 2])
    assert schedule.step(0, model, optimizer) is optimizer
    optimizer = schedule.step(5, model, optimizer)
    assert schedule.done and len(schedule.history) == 1 and schedule.history[0]["budget"] == 0.4


@pytest.mark.parametrize("budgets, epochs, kwargs, text", [
    ([0.5, 0.8], [1, 2], {}, "must decrease"),
    ([0.8, 0.5], [2, 2], {}, "must increase"),
    ([0.8, 0.5], [1], {}, "same number"),
    ([1.5], [1], {}, "fractions in"),
    ([0.5], [-1], {}, "integers >= 0"),
    ([0.5], [1], {"rank": 3}, "sets the budget itself"),
])
def test_bad_schedules(budgets, epochs, kwargs, text) -> None:
    with pytest.raises(FactorizeError, match=text):
        ProgressiveSchedule(budgets, epochs, **kwargs)


def test_bad_calls() -> None:
    torch.manual_seed(0)
    model = MLP()
    with pytest.raises(FactorizeError, match=r"torch\.optim\.Optimizer"):
        compress_in_training(model, "adam", rank=4)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    with pytest.raises(FactorizeError, match="in place"):
        compress_in_training(model, optimizer, rank=4, inplace=False)
    _, optimizer = compress_in_training(model, optimizer, rank=4)
    with pytest.raises(FactorizeError, match="calibration is not supported"):
        compress_in_training(model, optimizer, rank=2, calibration=[torch.randn(4, 24)])
