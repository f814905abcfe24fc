"""Shared small models for the tests. Nothing here downloads anything."""

from __future__ import annotations

import pytest
import torch
from torch import nn


class MLP(nn.Module):
    def __init__(self, d_in: int = 24, hidden: int = 48, d_out: int = 10) -> None:
        super().__init__()
        self.fc1 = nn.Linear(d_in, hidden)
        self.fc2 = nn.Linear(hidden, hidden)
        self.head = nn.Linear(hidden, d_out)

    def forward(self, x):
        return self.head(torch.relu(self.fc2(torch.relu(self.fc1(x)))))


class CNN(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.c1 = nn.Conv2d(3, 16, 3, padding=1)
        self.c2 = nn.Conv2d(16, 24, 3, stride=2, padding=2, dilation=2)
        self.dw = nn.Conv2d(24, 24, 3, padding=1, groups=24)  # depthwise: skipped with a reason
        self.c3 = nn.Conv1d(24, 20, 5, padding=2, bias=False)
        self.fc = nn.Linear(20, 7)

    def forward(self, x):  # (B, 3, H, W)
        h = torch.relu(self.c2(torch.relu(self.c1(x))))
        h = self.dw(h).flatten(2)  # (B, 24, L)
        h = torch.relu(self.c3(h)).mean(-1)  # (B, 20)
        return self.fc(h)


class TiedLM(nn.Module):
    """Embedding tied to the output head, as in GPT-style language models."""

    def __init__(self, vocab: int = 50, dim: int = 16) -> None:
        super().__init__()
        self.embed = nn.Embedding(vocab, dim)
        self.mix = nn.Linear(dim, dim)
        self.head = nn.Linear(dim, vocab, bias=False)
        self.head.weight = self.embed.weight

    def forward(self, ids):
        return self.head(torch.tanh(self.mix(self.embed(ids))))


@pytest.fixture
def mlp():
    torch.manual_seed(0)
    return MLP().eval()


@pytest.fixture
def cnn():
    torch.manual_seed(0)
    return CNN().eval()


@pytest.fixture
def tied_lm():
    torch.manual_seed(0)
    return TiedLM().eval()


def tiny_bert():
    transformers = pytest.importorskip("transformers")
    cfg = transformers.BertConfig(
        vocab_size=64, hidden_size=32, num_hidden_layers=2, num_attention_heads=4, intermediate_size=48,
        max_position_embeddings=32, type_vocab_size=2,
    )
    torch.manual_seed(0)
    return transformers.BertModel(cfg).eval()


def tiny_gpt2():
    transformers = pytest.importorskip("transformers")
    cfg = transformers.GPT2Config(
        vocab_size=64, n_positions=32, n_embd=32, n_layer=2, n_head=4, bos_token_id=0, eos_token_id=0
    )
    torch.manual_seed(0)
    return transformers.GPT2LMHeadModel(cfg).eval()


@pytest.fixture(scope="session")
def dask_engine():
    """One Dask local cluster of 2 worker processes (1 thread each) shared by the cluster tests (starting one and
    importing torch in its workers takes seconds); skipped without the optional ``distributed`` package
    (``factorize[cluster]``)."""
    pytest.importorskip("distributed")
    from factorize.cluster import open_engine

    engine = open_engine(2)
    try:
        yield engine
    finally:
        engine.close()
