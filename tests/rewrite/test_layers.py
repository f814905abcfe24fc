"""Factored modules: full-rank reproduction, training, compile/export, merge back."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from factorize import decompose
from factorize.model.sites import matrix_of
from factorize.rewrite.layers import factor_module, is_factored, to_dense


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
    ("conv3d", lambda: nn.Conv3d(3, 8, 3, stride=2, padding=1), lambda: torch.randn(2, 3, 7, 7, 7)),
    ("conv3d", lambda: nn.Conv3d(4, 5, (3, 2, 2), padding=(2, 1, 0), dilation=(2, 1, 1), bias=False),
     lambda: torch.randn(1, 4, 6, 5, 5)),
    ("conv3d", lambda: nn.Conv3d(2, 3, 2, padding=1, padding_mode="circular"), lambda: torch.randn(2, 5, 4, 4)),
    ("conv_transpose1d", lambda: nn.ConvTranspose1d(6, 4, 3, stride=2, padding=1, output_padding=1),
     lambda: torch.randn(3, 6, 11)),
    ("conv_transpose1d", lambda: nn.ConvTranspose1d(5, 9, 4, dilation=2, bias=False), lambda: torch.randn(2, 5, 7)),
    ("conv_transpose2d", lambda: nn.ConvTranspose2d(8, 3, 4, stride=2, padding=1), lambda: torch.randn(2, 8, 5, 5)),
    ("conv_transpose2d", lambda: nn.ConvTranspose2d(3, 7, (3, 2), stride=(3, 2), padding=(1, 0),
                                                    output_padding=(2, 1), dilation=(1, 2)),
     lambda: torch.randn(1, 3, 4, 6)),
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


# --- drop-in: what parents read, subclasses in place, merge back to the original class -------------------------

DROP_IN = [
    ("linear", lambda: nn.Linear(9, 12), ("in_features", "out_features")),
    ("conv2d", lambda: nn.Conv2d(3, 8, 3, stride=2, padding=1), ("in_channels", "out_channels", "kernel_size",
                                                                  "stride", "padding", "dilation", "groups",
                                                                  "padding_mode")),
    ("conv1d", lambda: nn.Conv1d(5, 7, 4, stride=2, padding=1), ("stride", "padding", "kernel_size")),
    ("embedding", lambda: nn.Embedding(30, 6, padding_idx=0), ("num_embeddings", "embedding_dim", "padding_idx")),
    ("transposed", _transposed, ("nf", "nx")),
    ("conv3d", lambda: nn.Conv3d(3, 8, 3, stride=2, padding=1), ("in_channels", "out_channels", "kernel_size",
                                                                  "stride", "padding", "dilation", "groups")),
    ("conv_transpose1d", lambda: nn.ConvTranspose1d(6, 4, 3, stride=2, padding=1, output_padding=1),
     ("in_channels", "out_channels", "kernel_size", "stride", "padding", "output_padding", "transposed")),
    ("conv_transpose2d", lambda: nn.ConvTranspose2d(8, 3, 4, stride=2, padding=1, dilation=2),
     ("in_channels", "out_channels", "kernel_size", "stride", "padding", "dilation", "groups")),
]


@pytest.mark.parametrize("kind,make,attrs", DROP_IN)
def test_factored_layer_answers_what_parents_read(kind, make, attrs):
    torch.manual_seed(0)
    layer = make().double()
    fac = _full_rank(layer, kind)
    assert fac.weight.shape == layer.weight.shape and fac.weight.dtype == layer.weight.dtype
    torch.testing.assert_close(fac.weight, layer.weight, rtol=1e-10, atol=1e-10)  # full rank: the same weight
    assert not isinstance(fac.weight, nn.Parameter) and "weight" not in dict(fac.named_parameters())
    if getattr(layer, "bias", None) is not None:
        assert fac.bias is fac.second.bias and torch.equal(fac.bias, layer.bias)
    for a in attrs:
        assert getattr(fac, a) == getattr(layer, a), a
    with pytest.raises((KeyError, AttributeError)):  # the computed weight cannot be overwritten silently
        fac.weight = nn.Parameter(layer.weight.detach().clone())


@pytest.mark.parametrize("kind,make,attrs", DROP_IN)
def test_merge_restores_class_layout_and_keys(kind, make, attrs):
    torch.manual_seed(0)
    layer = make().double()
    dense = to_dense(_full_rank(layer, kind))
    assert type(dense) is type(layer)
    assert dense.state_dict().keys() == layer.state_dict().keys()
    for key, value in layer.state_dict().items():
        torch.testing.assert_close(dense.state_dict()[key], value, rtol=1e-10, atol=1e-10)
    for a in attrs:
        assert getattr(dense, a) == getattr(layer, a)


class Positions(nn.Embedding):
    """A position table called with extra keywords (the pattern of Whisper's decoder positions)."""

    def forward(self, ids, past_length=0, position_ids=None):
        if position_ids is not None:
            return self.weight[position_ids]
        return self.weight[past_length : past_length + ids.shape[-1]]


def test_subclass_is_factored_in_place_and_keeps_its_forward():
    import io

    torch.manual_seed(0)
    pos = Positions(40, 8).double()
    fac = _full_rank(pos, "embedding")
    assert isinstance(fac, Positions) and is_factored(fac)
    assert sorted(fac.state_dict()) == ["first.weight", "second.weight"]  # the file format's keys
    ids = torch.zeros(2, 5, dtype=torch.long)
    torch.testing.assert_close(fac(ids, past_length=3), pos(ids, past_length=3))
    torch.testing.assert_close(fac(ids, position_ids=torch.arange(5)), pos(ids, position_ids=torch.arange(5)))
    buf = io.BytesIO()  # whole-module pickling works: the in-place class is rebuilt from the subclass
    torch.save(fac, buf)
    buf.seek(0)
    again = torch.load(buf, weights_only=False)
    assert type(again) is type(fac) and torch.equal(again.first.weight, fac.first.weight)
    dense = to_dense(fac)
    assert type(dense) is Positions and list(dense.state_dict()) == ["weight"]
    torch.testing.assert_close(dense(ids, past_length=2), pos(ids, past_length=2))


def test_frozen_weight_stays_frozen():
    emb = nn.Embedding(20, 4).requires_grad_(False)
    fac = _full_rank(emb, "embedding")
    assert not any(p.requires_grad for p in fac.parameters())
    assert not to_dense(fac).weight.requires_grad


def test_multihead_attention_and_fused_encoder_path_run_with_factored_layers():
    # nn.MultiheadAttention hands out_proj.weight to F.multi_head_attention_forward; nn.TransformerEncoderLayer in
    # eval mode under no_grad passes every weight to one fused kernel (torch docs, "fast path").
    torch.manual_seed(0)
    enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(16, 2, 32, batch_first=True), 2,
                                enable_nested_tensor=False).eval()
    x = torch.randn(3, 5, 16)
    with torch.no_grad():
        ref = enc(x)
    for layer in enc.layers:
        layer.self_attn.out_proj = _full_rank(layer.self_attn.out_proj, "linear")
        layer.linear1 = _full_rank(layer.linear1, "linear")
    assert isinstance(enc.layers[0].self_attn.out_proj, nn.modules.linear.NonDynamicallyQuantizableLinear)
    with torch.no_grad():
        torch.testing.assert_close(enc(x), ref, rtol=1e-4, atol=1e-4)
    assert enc.train()(x).shape == ref.shape  # the unfused path too


def test_conv_transpose_keeps_output_size_argument():
    # torch's ConvTranspose forward takes output_size to resolve the ambiguity of a strided transpose (torch docs).
    torch.manual_seed(0)
    up = nn.ConvTranspose2d(4, 3, 3, stride=2, padding=1).double()
    fac = _full_rank(up, "conv_transpose2d")
    x = torch.randn(1, 4, 5, 5, dtype=torch.float64)
    ref = up(x, output_size=[10, 10])
    assert ref.shape[-2:] == (10, 10)
    torch.testing.assert_close(fac(x, output_size=[10, 10]), ref, rtol=1e-10, atol=1e-10)


class Upsample(nn.ConvTranspose1d):
    """A subclass keeping the stock forward: factored in place, it still runs the two thin layers."""


class Volume(nn.Conv3d):
    """A subclass with its own forward: factored in place, it runs the dense op on the computed weight."""

    def forward(self, x, scale=1.0):
        return super().forward(x) * scale


@pytest.mark.parametrize("make,kind,x", [
    (lambda: Upsample(4, 6, 3, stride=2), "conv_transpose1d", lambda: torch.randn(2, 4, 9)),
    (lambda: Volume(3, 4, 2), "conv3d", lambda: torch.randn(1, 3, 4, 4, 4)),
])
def test_new_conv_subclasses_are_factored_in_place_and_merge_back(make, kind, x):
    torch.manual_seed(0)
    layer, x = make().double(), x().double()
    fac = _full_rank(layer, kind)
    assert isinstance(fac, type(layer)) and is_factored(fac)
    torch.testing.assert_close(fac(x), layer(x), rtol=1e-10, atol=1e-10)
    dense = to_dense(fac)
    assert type(dense) is type(layer) and list(dense.state_dict()) == list(layer.state_dict())
    torch.testing.assert_close(dense(x), layer(x), rtol=1e-10, atol=1e-10)


SAVE_LOAD = [
    (lambda: nn.Sequential(nn.Conv3d(2, 6, 3, padding=1), nn.ReLU(), nn.Conv3d(6, 4, 2)),
     lambda: torch.randn(2, 2, 5, 5, 5)),
    (lambda: nn.Sequential(nn.ConvTranspose1d(6, 5, 4, stride=2, padding=1), nn.ReLU(),
                           nn.ConvTranspose1d(5, 3, 3, output_padding=0)),
     lambda: torch.randn(2, 6, 8)),
    (lambda: nn.Sequential(nn.ConvTranspose2d(6, 5, 4, stride=2, padding=1), nn.ReLU(),
                           nn.ConvTranspose2d(5, 3, 3, stride=2, output_padding=1)),
     lambda: torch.randn(2, 6, 4, 4)),
]


@pytest.mark.parametrize("make,inputs", SAVE_LOAD)
def test_new_conv_kinds_save_load_exact(make, inputs, tmp_path):
    # The file holds the factors; a fresh instance of the architecture must compute exactly what was saved.
    import factorize

    torch.manual_seed(0)
    model, x = make(), inputs()
    result = factorize.compress(model, budget=0.7)
    assert result.plan["sites"] and any(e.get("action") == "factor" for e in result.plan["sites"].values())
    path = factorize.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    torch.manual_seed(1)
    fresh = factorize.load(make(), path)
    with torch.no_grad():
        assert torch.equal(fresh(x), result.model(x))
    merged = factorize.merge(fresh)
    assert [type(m) for m in merged] == [type(m) for m in model]
