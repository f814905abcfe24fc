"""The walker: which layers become sites, their matrix views, and tied weights."""

from __future__ import annotations

import pytest
import torch
from conftest import tiny_bert, tiny_gpt2
from torch import nn

from factorize import FactorizeError, walk
from factorize.model.sites import is_transposed_projection, matrix_of


def test_mlp_sites_and_break_even(mlp):
    found = walk(mlp)
    assert [s.name for s in found] == ["fc1", "fc2", "head"]
    fc1 = found.by_name()["fc1"]
    assert fc1.kind == "linear" and fc1.shape == (48, 24) and fc1.params == 48 * 24
    # Common practice: rank-r factors store r(m+n) numbers, so saving needs r < mn/(m+n).
    assert fc1.break_even == (48 * 24) // (48 + 24) == 16
    assert fc1.saves_at(15) and not fc1.saves_at(16)


def test_conv_sites_and_grouped_conv_skipped(cnn):
    found = walk(cnn)
    sites = found.by_name()
    assert sites["c1"].kind == "conv2d" and sites["c1"].shape == (16, 3 * 3 * 3) and sites["c1"].kernel == (3, 3)
    assert sites["c3"].kind == "conv1d" and sites["c3"].shape == (20, 24 * 5)
    assert "dw" not in sites
    assert any(s.name == "dw" and "groups=24" in s.reason for s in found.skipped)
    assert torch.equal(matrix_of(cnn.c1, "conv2d"), cnn.c1.weight.reshape(16, -1))


def test_include_exclude_globs(mlp):
    assert [s.name for s in walk(mlp, include="fc*")] == ["fc1", "fc2"]
    assert [s.name for s in walk(mlp, exclude=["head", "fc1"])] == ["fc2"]
    with pytest.raises(FactorizeError, match="patterns must be strings"):
        walk(mlp, include=[3])


def test_tied_embedding_and_head(tied_lm):
    sites = walk(tied_lm).by_name()
    assert sites["embed"].kind == "embedding" and sites["embed"].shape == (16, 50)  # (dim, vocab)
    assert sites["embed"].tied_with == ("head",) and sites["head"].tied_with == ("embed",)
    assert sites["mix"].tied_with == ()


def test_transposed_projection_rule():
    pytest.importorskip("transformers")
    from transformers.pytorch_utils import Conv1D

    assert is_transposed_projection(Conv1D(7, 5))  # GPT-2 style: weight (in=5, out=7), y = x @ W + b

    class NotAProjection(nn.Module):  # 2-D weight, but computes something else
        def __init__(self):
            super().__init__()
            self.weight = nn.Parameter(torch.randn(5, 7))

        def forward(self, x):
            return torch.tanh(x @ self.weight)

    assert not is_transposed_projection(NotAProjection())
    assert not is_transposed_projection(nn.Linear(5, 7))
    # the premise, from transformers itself (transformers.pytorch_utils.Conv1D: "works like a linear layer but
    # the weights are transposed"): weight (in, out) and y = x @ W + b
    conv = Conv1D(7, 5)
    nn.init.normal_(conv.bias)
    x = torch.randn(3, 5, generator=torch.Generator().manual_seed(0))
    assert tuple(conv.weight.shape) == (5, 7)
    torch.testing.assert_close(conv(x), x @ conv.weight + conv.bias)


def test_tiny_bert_finds_every_projection():
    found = walk(tiny_bert())  # transformers.BertModel from a tiny config; its module names, as transformers has them
    kinds = {s.name: s.kind for s in found}
    for layer in range(2):
        for proj in ("attention.self.query", "attention.self.key", "attention.self.value",
                     "attention.output.dense", "intermediate.dense", "output.dense"):
            assert kinds[f"encoder.layer.{layer}.{proj}"] == "linear"
    assert kinds["embeddings.word_embeddings"] == "embedding"


def test_tiny_gpt2_transposed_projections_and_tied_head():
    # transformers.GPT2LMHeadModel from a tiny config (n_embd 32): Conv1D projections, c_attn holding q, k, v
    # (out 3 * 32), the MLP 4x wide (out 128), lm_head tied to wte (transformers' default for GPT-2)
    found = walk(tiny_gpt2())
    sites = found.by_name()
    for layer in range(2):
        for proj, shape in (("attn.c_attn", (96, 32)), ("attn.c_proj", (32, 32)),
                            ("mlp.c_fc", (128, 32)), ("mlp.c_proj", (32, 128))):
            site = sites[f"transformer.h.{layer}.{proj}"]
            assert site.kind == "transposed" and site.shape == shape
    assert sites["lm_head"].tied_with == ("transformer.wte",)


def test_not_a_module():
    with pytest.raises(FactorizeError, match=r"expected a torch\.nn\.Module"):
        walk({"weight": torch.zeros(2, 2)})


def test_every_weight_matrix_is_a_site_or_skipped_with_a_reason():
    class Mixed(nn.Module):
        def __init__(self):
            super().__init__()
            self.attn = nn.MultiheadAttention(8, 2)
            self.rnn = nn.GRU(8, 8)
            self.c3 = nn.Conv3d(2, 3, 3)
            self.up = nn.ConvTranspose2d(3, 2, 2)
            self.grouped = nn.Conv2d(4, 4, 3, groups=2)
            self.table = nn.Parameter(torch.zeros(1, 4, 8))  # used directly by forward, e.g. a position table
            self.int_lin = nn.Linear(4, 4)

    m = Mixed()
    m.int_lin.weight = nn.Parameter(torch.zeros(4, 4, dtype=torch.int8), requires_grad=False)
    found = walk(m)
    assert [s.name for s in found] == ["attn.out_proj", "c3", "up"]  # Conv3d and ConvTranspose2d are sites now
    reasons = {s.name: s.reason for s in found.skipped}
    assert "in_proj_weight" in reasons["attn"] and "weight_ih" in reasons["rnn"]
    assert "groups=2" in reasons["grouped"] and "int8" in reasons["int_lin"]
    assert "(1, 4, 8)" in reasons["table"]
    covered = {s.name for s in found} | set(reasons)
    for name, p in m.named_parameters():
        if p.dim() >= 2:
            owner = name.rpartition(".")[0]
            assert owner in covered or name in covered, name


def test_factored_layers_are_not_walked_again():
    from factorize.rewrite.layers import factor_module

    class Sub(nn.Linear):  # a subclass is factored in place and is still an nn.Linear
        pass

    model = nn.Sequential(Sub(6, 6))
    model[0] = factor_module(model[0], "linear", torch.randn(6, 2), torch.randn(2, 6))
    assert isinstance(model[0], nn.Linear)
    assert [s.name for s in walk(model)] == ["0.first", "0.second"]  # as for a swapped layer
